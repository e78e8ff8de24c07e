"""Engine definitions: ready engine settings kept as YAML files, found by name.

A campaign's ``engine`` (or ``placement.screen.engine``) may say ``definition: NAME``; the file
``NAME.yaml`` is looked up, in order, in ``engines/`` beside the campaign config, in each folder
of ``$IONWELL_ENGINES`` (``:``-separated), and among the definitions shipped with ionwell. Keys
given beside ``definition`` override the file's (nested mappings merge key by key; lists and
values replace). A template named by ``input.template`` is read relative to the file that names
it, and its text is kept in the config (``input.template_text``), so a frozen campaign needs no
file outside its folder.

Frozen campaigns: once merged, a command engine says ``definition_merged: true`` beside
``definition: NAME``; the mapping is then complete, ``definition`` is a record of where it came
from, and :func:`resolve_engines` does not look the file up again. So ``campaigns/<name>/
campaign.yaml`` (the frozen, merged config) loads from the campaign folder on any machine,
whether or not the definition file is there, and a later change of the definition file cannot
change a campaign already frozen. (A frozen config written before this marker existed, with
``definition`` and a complete mapping but no marker, is taken as is, with a warning, when its
definition is no longer found.)
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import Any

from ionwell.errors import ConfigError

__all__ = ["definition_dirs", "find_definition", "list_definitions", "resolve_engines"]

log = logging.getLogger("ionwell.config.definitions")

#: Keys a command engine cannot do without: a mapping holding them all is complete.
_REQUIRED = ("input", "argv", "outputs", "converged")


def _packaged_dir() -> Path | None:
    here = Path(__file__).resolve().parents[1]
    for candidate in (here / "engine_files", here.parents[1] / "config" / "engines"):
        if candidate.is_dir():
            return candidate
    return None


def definition_dirs(config_dir: Path | None = None) -> list[Path]:
    """Folders searched for engine definitions, first match wins."""
    dirs: list[Path] = []
    if config_dir is not None:
        dirs.append(Path(config_dir) / "engines")
    for part in os.environ.get("IONWELL_ENGINES", "").split(":"):
        if part:
            dirs.append(Path(part).expanduser())
    packaged = _packaged_dir()
    if packaged is not None:
        dirs.append(packaged)
    return dirs


def list_definitions(config_dir: Path | None = None) -> list[tuple[str, Path]]:
    """Every definition found, by name (a name found twice: the first folder's)."""
    seen: dict[str, Path] = {}
    for d in definition_dirs(config_dir):
        if d.is_dir():
            for f in sorted(d.glob("*.yaml")):
                seen.setdefault(f.stem, f)
    return sorted(seen.items())


def find_definition(name: str, config_dir: Path | None = None) -> Path:
    """The definition file for ``name``; ConfigError lists the folders searched."""
    if not name or "/" in name or name.startswith("."):
        raise ConfigError(f"engine.definition: {name!r} is not a definition name")
    for d in definition_dirs(config_dir):
        f = d / f"{name}.yaml"
        if f.is_file():
            return f
    where = ", ".join(str(d) for d in definition_dirs(config_dir)) or "(none)"
    known = ", ".join(n for n, _ in list_definitions(config_dir)) or "none"
    raise ConfigError(
        f"engine.definition: no definition named {name!r} (searched {where}; found: {known})"
    )


def _merge(base: dict, over: dict) -> dict:
    out = dict(base)
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = v
    return out


def _read_template(engine: dict, base: Path, field: str) -> dict:
    inp = engine.get("input")
    if not isinstance(inp, dict) or inp.get("template") is None or "template_text" in inp:
        return engine
    f = Path(str(inp["template"])).expanduser()
    if not f.is_absolute():
        f = base / f
    try:
        text = f.read_text()
    except OSError as err:
        raise ConfigError(
            f"{field}.input.template: cannot read {f} ({err.strerror or err}); expected a "
            "template file, relative to the file that names it"
        ) from None
    except UnicodeDecodeError as err:
        raise ConfigError(
            f"{field}.input.template: {f} is not UTF-8 text (byte {err.start}: "
            f"0x{err.object[err.start]:02x}); expected a text template"
        ) from None
    return {**engine, "input": {**inp, "template_text": text}}


def _resolve_one(engine: Any, config_dir: Path, field: str) -> Any:
    if not isinstance(engine, dict):
        return engine
    name = engine.get("definition")
    if name is not None and not isinstance(name, str):
        raise ConfigError(
            f"{field}.definition: expected the name of an engine definition, e.g. "
            f"'quantum-espresso' (found {name!r})"
        )
    if name is not None and engine.get("definition_merged") is True:
        return _read_template(engine, config_dir, field)  # complete: 'definition' is a record
    if name is not None:
        try:
            path = find_definition(str(name), config_dir)
        except ConfigError:
            if engine.get("kind") == "command" and all(k in engine for k in _REQUIRED):
                log.warning(
                    "%s: definition %r not found; the mapping is complete (a frozen config), "
                    "taken as it is",
                    field,
                    name,
                )
                return _read_template({**engine, "definition_merged": True}, config_dir, field)
            raise
        from ionwell.config.campaign import read_yaml

        data = read_yaml(path, "a YAML engine definition")
        if not isinstance(data, dict):
            raise ConfigError(f"{path}: expected a mapping of engine settings")
        data = _read_template(data, path.parent, f"{path}:")
        data.pop("definition_merged", None)
        engine = _merge(data, engine)
        if engine.get("kind", "pyscf") != "command":
            engine.pop("definition")  # only the command engine records its definition's name
            engine.pop("definition_merged", None)
        else:
            engine["definition_merged"] = True
    return _read_template(engine, config_dir, field)


def resolve_engines(data: Any, config_dir: Path) -> Any:
    """The campaign mapping with its engine definitions merged and templates read."""
    if not isinstance(data, dict):
        return data
    out = dict(data)
    if "engine" in out:
        out["engine"] = _resolve_one(out["engine"], config_dir, "engine")
    placement = out.get("placement")
    if isinstance(placement, dict) and isinstance(placement.get("screen"), dict):
        screen = dict(placement["screen"])
        if "engine" in screen:
            screen["engine"] = _resolve_one(screen["engine"], config_dir, "placement.screen.engine")
        out["placement"] = {**placement, "screen": screen}
    return out
