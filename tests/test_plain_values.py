"""The CLI's plain option values (disagg.cli._plain_value) are the very values typer's own
pydantic conversion gives, and a breakdown does not import pydantic (test_imports.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

typer_coercion = pytest.importorskip("typer._coercion")
typer_models = pytest.importorskip("typer.models")

from disagg.cli import _NOT_PLAIN, _plain_value  # noqa: E402

CASES = [
    (str, "abc"), (str, ""), (str, " 2025-01-01 "), (str, "-"),
    (float, 0.95), (float, "0.9"), (float, "-3"), (float, "12.000000000000001"),
    (float, "1e3"), (float, " 0.5"), (float, "nan"), (float, ".5"), (float, "1_000"),
    (float, "abc"), (float, "0.1234567890123456789"), (float, 2),
    (int, 3), (int, "2"), (int, "-7"), (int, "007"), (int, "2.0"), (int, "1_000"), (int, "x"),
    (bool, True), (bool, False), (bool, "true"),
    (Path, "site.toml"), (Path, "a//b/./c/"), (Path, "/tmp"), (Path, ""), (Path, "-"),
    (Path, Path("x.toml")),
]


def _typer_value(annotation, info, value):
    """What typer's own conversion gives (the value, or the exception's text)."""
    desc = typer_coercion.resolve_type_descriptor(annotation, info)
    try:
        return typer_coercion.build_runtime_param(desc)._coerce_value(value, None, None)
    except Exception as exc:  # noqa: BLE001 - the text is compared
        return f"{type(exc).__name__}: {exc}"


@pytest.mark.parametrize("annotation,value", CASES)
def test_a_plain_value_is_what_typer_gives(annotation, value):
    info = typer_models.OptionInfo(readable=False)
    plain = _plain_value(annotation, info, value)
    if plain is _NOT_PLAIN:
        return  # typer's own conversion decides (checked by running it in test_cli.py)
    want = _typer_value(annotation, info, value)
    assert type(plain) is type(want) and plain == want


def test_the_plain_forms_cover_what_a_usual_command_line_gives():
    info = typer_models.OptionInfo(readable=False)
    for annotation, value in [(float, 0.95), (float, "0.9"), (int, "2"), (str, "x"),
                              (Path, "site.toml"), (bool, True)]:
        assert _plain_value(annotation, info, value) is not _NOT_PLAIN
    # a path typer would check (exists=True) is left to typer
    assert _plain_value(Path, typer_models.OptionInfo(exists=True), "x") is _NOT_PLAIN
