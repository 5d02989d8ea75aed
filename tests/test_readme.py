"""The README's user reference stays true to the code.

Every config key appears in the README's "Configuration" tables with the default the code has,
and every key those tables name exists. The decoder snippet is run in ``test_publisher.py``; the
test command block is what CI runs (``.ci/run``).
"""

from __future__ import annotations

import math
import re
import typing
from pathlib import Path

from pydantic import BaseModel

from brimline.daemon.runtime.config import Config

README = Path(__file__).resolve().parents[1] / "README.md"


def _configuration_text() -> str:
    """The README from "## Configuration" up to the next top-level section."""
    text = README.read_text()
    start = text.index("\n## Configuration\n")
    end = text.index("\n## ", start + 1)
    return text[start:end]


def shown(value) -> str:
    """A default as the README writes it: YAML spelling, floats as Python prints them (with a
    decimal point before an exponent, so that YAML reads them back as numbers)."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isinf(value):
            return ".inf" if value > 0 else "-.inf"
        text = repr(value)
        mantissa, e, exponent = text.partition("e")
        if e and "." not in mantissa:
            text = f"{mantissa}.0e{exponent}"
        return text
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(shown(v) for v in value) + "]"
    return str(value)


def _section_of(annotation):
    """The config section class a field holds (directly, optional, or as list items), or None."""
    for arg in typing.get_args(annotation) or (annotation,):
        if isinstance(arg, type) and issubclass(arg, BaseModel):
            return arg
        inner = _section_of(arg) if typing.get_args(arg) else None
        if inner is not None:
            return inner
    return None


def config_keys(model=Config, prefix: str = ""):
    """Yield ``(key path, default as shown, item keys)`` for every leaf key of the config.

    A subsection (``driver.sim``) is walked into; a list of records (``driver.sim.events``) is
    one key whose item keys the README's meaning column must name."""
    for name, field in model.model_fields.items():
        sub = _section_of(field.annotation)
        origin = typing.get_origin(field.annotation)
        if sub is not None and origin is not list:
            yield from config_keys(sub, f"{prefix}{name}.")
            continue
        default = ("required" if field.is_required()
                   else shown(field.get_default(call_default_factory=True)))
        items = tuple(sub.model_fields) if sub is not None else ()
        yield f"{prefix}{name}", default, items


def test_every_config_key_is_in_the_readme_with_its_default():
    text = _configuration_text()
    missing = []
    for key, default, items in config_keys():
        row = re.search(rf"^\| `{re.escape(key)}` \| {re.escape(default)} \|(.*)\|$", text, re.M)
        if row is None:
            missing.append(f"{key} (default {default})")
            continue
        for item in items:
            assert item in row.group(1), f"README row of {key} does not name its key {item}"
    assert not missing, "README Configuration tables lack or misstate: " + ", ".join(missing)


def test_the_readme_names_no_config_key_the_code_lacks():
    keys = {key for key, _, _ in config_keys()}
    sections = {key.split(".")[0] for key in keys}
    named = re.findall(r"^\| `([a-z_]+(?:\.[a-z_]+)+)` \|", _configuration_text(), re.M)
    assert named, "no key rows found in the README's Configuration section"
    stale = [k for k in named if k.split(".")[0] in sections and k not in keys]
    assert not stale, f"README names keys the config does not have: {stale}"
