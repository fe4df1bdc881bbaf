"""``--config FILE``: a command's options read from a TOML (or YAML) file.

Every option of a command is keyed by its long option name without the leading dashes
(``components = 20``, ``memory-limit = "4GB"``; underscores are accepted for dashes), its
positional arguments by their name (``input``, ``model``); the negative form of a flag
is accepted too (``no-center = true``). Keys stand at the top level or under a table
named after the command (``[fit]``); the table wins over the top level, the command line
over both. Tables named after other commands are ignored, so one file can serve a whole
workflow. An unknown key is an error naming the key and its nearest valid spelling.

The values are handed to the parser as its defaults (``Context.default_map``), so they
are converted and checked exactly like values typed on the command line, and options that
any command adds later are covered without a line here.

Standard library only (``tomllib``; PyYAML is used for ``.yaml``/``.yml`` files when it is
installed), so that ``axiscope --help`` stays fast.
"""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Any

__all__ = ["ConfigError", "read_config_file", "config_keys", "defaults_from_config", "resolved_configuration"]

#: Options that make no sense inside a configuration file.
_NOT_IN_FILE = {"config", "help"}


class ConfigError(ValueError):
    """The configuration file cannot be read or holds a key the command does not have."""


def read_config_file(path: Path) -> dict:
    """The mapping in ``path``: TOML, or YAML for ``.yaml``/``.yml`` (needs PyYAML)."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if path.suffix.lower() in (".yaml", ".yml"):
        try:
            import yaml
        except ImportError:
            raise ConfigError(f"{path}: YAML files need PyYAML (pip install pyyaml); "
                              "or write the file as TOML") from None
        try:
            loaded = yaml.safe_load(data.decode("utf-8"))
        except (yaml.YAMLError, UnicodeDecodeError) as exc:
            raise ConfigError(f"{path}: not valid YAML ({' '.join(str(exc).split())})") from None
        loaded = {} if loaded is None else loaded
    else:
        import tomllib

        try:
            loaded = tomllib.loads(data.decode("utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    if not isinstance(loaded, dict):
        raise ConfigError(f"{path}: holds a {type(loaded).__name__}, not a table of option = value")
    return loaded


def config_keys(command: Any) -> dict[str, tuple[str, bool]]:
    """Every key a configuration file may use for ``command``, mapped to ``(parameter name, negated)``.

    Long options without dashes (and with underscores for dashes), the negative form of
    on/off flags, and positional arguments by their name.
    """
    keys: dict[str, tuple[str, bool]] = {}
    for param in command.params:
        if not param.name or param.name in _NOT_IN_FILE:
            continue
        if param.param_type_name == "argument":
            names = [(param.name, False)]
        else:
            names = [(opt.lstrip("-"), False) for opt in param.opts if opt.startswith("--")]
            names += [(opt.lstrip("-"), True) for opt in getattr(param, "secondary_opts", ())
                      if opt.startswith("--")]
        for name, negated in names:
            keys[name] = (param.name, negated)
            keys[name.replace("-", "_")] = (param.name, negated)
    return keys


def defaults_from_config(loaded: dict, command: Any, command_name: str, command_names: set[str],
                         path: Path) -> dict[str, Any]:
    """The parser defaults (parameter name → value) that the file ``path`` gives ``command``."""
    keys = config_keys(command)
    merged: dict[str, Any] = {}
    table = loaded.get(command_name)
    if table is not None and not isinstance(table, dict):
        raise ConfigError(f"{path}: '{command_name}' must be a table of options ([{command_name}])")
    sections = [("", {k: v for k, v in loaded.items() if k not in command_names})]
    if table is not None:
        sections.append((f"[{command_name}] ", table))
    for where, section in sections:  # the command's table last: it wins
        for key, value in section.items():
            if key not in keys:
                raise ConfigError(_unknown(path, where, key, keys, command_name))
            name, negated = keys[key]
            if negated:
                if not isinstance(value, bool):
                    raise ConfigError(f"{path}: {where}'{key}' takes true or false, not {value!r}")
                value = not value
            merged[name] = _plain(value)
    return merged


def _unknown(path: Path, where: str, key: str, keys: dict, command_name: str) -> str:
    options = sorted({k for k in keys if "_" not in k or k.replace("_", "-") not in keys})
    near = difflib.get_close_matches(key.replace("_", "-"), options, n=1, cutoff=0.6)
    hint = f"did you mean '{near[0]}'?" if near else f"see 'axiscope {command_name} --help' for the options"
    return f"{path}: {where}unknown key '{key}' for 'axiscope {command_name}'; {hint}"


def _plain(value: Any) -> Any:
    """A value as the parser takes it: lists stay lists (repeated options), the rest as is."""
    if isinstance(value, tuple):
        return list(value)
    return value


def resolved_configuration(ctx: Any, config_file: Path | None) -> dict:
    """The options a command ran with and where each came from, for its manifest.

    ``values``: long option name (or argument name) → value; ``sources``: ``command line``,
    ``config file``, ``environment`` or ``default``.
    """
    values: dict[str, Any] = {}
    sources: dict[str, str] = {}
    for param in ctx.command.params:
        if not param.name or param.name not in ctx.params or param.name == "help":
            continue
        longs = [opt.lstrip("-") for opt in getattr(param, "opts", ()) if opt.startswith("--")]
        key = longs[0] if longs and param.param_type_name == "option" else param.name
        values[key] = _jsonable(ctx.params[param.name])
        source = ctx.get_parameter_source(param.name)
        sources[key] = {"COMMANDLINE": "command line", "DEFAULT_MAP": "config file",
                        "ENVIRONMENT": "environment"}.get(getattr(source, "name", ""), "default")
    record = {"values": values, "sources": sources}
    if config_file is not None:
        record["file"] = str(config_file)
    return record


def _jsonable(value: Any) -> Any:
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if hasattr(value, "value") and isinstance(getattr(value, "value"), (str, int)):  # Enum
        return value.value
    return str(value)
