"""The parameters file: every analysis parameter in one small TOML file, written with each run and read back.

A run writes ``DIR/parameters.toml``; ``tenfold analyze IMAGE --out DIR2 --params DIR/parameters.toml`` (or the
napari dock) repeats it. The file holds the parameters as the user set them, not the values the automatic choices
resolved to, so a re-run on the same image makes the same choices again and the tables come out byte-identical.

Format: one flat TOML table, one key per field of :class:`~tenfold.analysis.parameters.Parameters`; an automatic
value is written as the string ``"auto"`` (TOML has no null). Reading uses the standard library's ``tomllib``
(a data format: nothing in the file is ever executed) and checks every key: unknown keys, wrong types and values
out of range are rejected with the key named. Missing keys keep their defaults, so a hand-written file may list
only what it changes.
"""

from __future__ import annotations

import dataclasses
import json
import math
import tomllib
from pathlib import Path

from ._errors import TenfoldInputError
from .parameters import Parameters

__all__ = ["load_parameters", "save_parameters", "parameters_from_toml", "parameters_to_toml", "AUTO",
           "PARAMETERS_FILE"]

#: how "choose automatically" (None) is spelled in the file
AUTO = "auto"
#: name of the file every run writes into its results folder
PARAMETERS_FILE = "parameters.toml"
#: bumped when a key changes meaning; older files are read, newer ones refused
FORMAT_VERSION = 1
_VERSION_KEY = "tenfold_parameters"


def _field_kinds() -> dict[str, tuple[type, bool]]:
    """name -> (base type, None allowed), from the annotations of ``Parameters`` (strings under PEP 563)."""
    kinds = {}
    for f in dataclasses.fields(Parameters):
        ann = str(f.type).replace(" ", "")
        parts = ann.split("|")
        optional = "None" in parts
        base = [p for p in parts if p != "None"]
        if len(base) != 1 or base[0] not in ("float", "int", "bool", "str"):
            raise TypeError(f"Parameters.{f.name}: annotation {f.type!r} is not supported by the parameters file")
        kinds[f.name] = ({"float": float, "int": int, "bool": bool, "str": str}[base[0]], optional)
    return kinds


def _check_value(key: str, value, kind: type, optional: bool, where: str):
    """The value for ``Parameters`` (``"auto"`` -> None), or raise naming the key."""
    if isinstance(value, str) and value == AUTO:
        if optional:
            return None
        raise TenfoldInputError(f"{where}: key {key!r} cannot be {AUTO!r}; give a {kind.__name__}")
    if kind is bool:
        ok = isinstance(value, bool)
    elif kind is int:
        ok = isinstance(value, int) and not isinstance(value, bool)
    elif kind is float:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if ok and not math.isfinite(value):
            raise TenfoldInputError(f"{where}: key {key!r} must be a finite number, got {value!r}")
    else:
        ok = isinstance(value, str)
    if not ok:
        allowed = f"a {'number' if kind is float else ('whole number' if kind is int else kind.__name__)}"
        if optional:
            allowed += f" or {AUTO!r}"
        raise TenfoldInputError(f"{where}: key {key!r} must be {allowed}, got {type(value).__name__} {value!r}")
    return float(value) if kind is float else value


def parameters_from_toml(text: str, *, source: str = "parameters file"):
    """Parse and check the text of a parameters file.

    Parameters
    ----------
    text : str
        TOML text.
    source : str
        How to name the file in error messages (its path).

    Returns
    -------
    Parameters
        Validated (:meth:`Parameters.validate`); keys not in the file keep their defaults.

    Raises
    ------
    TenfoldInputError
        Not TOML, a nested table, an unknown key, a wrong type or a value out of range; the message names the key.

    Examples
    --------
    >>> p = parameters_from_toml('ring_order = 10\\npixel_size_nm = "auto"\\n')
    >>> p.ring_order, p.pixel_size_nm
    (10, None)
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise TenfoldInputError(f"{source}: not valid TOML ({exc}); fix the file or write a new one with "
                                "save_parameters") from None
    version = data.pop(_VERSION_KEY, FORMAT_VERSION)
    if not (isinstance(version, int) and not isinstance(version, bool) and 1 <= version <= FORMAT_VERSION):
        raise TenfoldInputError(f"{source}: key {_VERSION_KEY!r} = {version!r} is not a format this Tenfold reads "
                                f"(1..{FORMAT_VERSION}); update Tenfold or remove the key")
    kinds = _field_kinds()
    unknown = sorted(set(data) - set(kinds))
    if unknown:
        raise TenfoldInputError(f"{source}: unknown key(s) {unknown}; known keys: {sorted(kinds)}")
    values = {k: _check_value(k, v, *kinds[k], source) for k, v in data.items()}
    try:
        return Parameters(**values).validate()
    except TenfoldInputError as exc:
        raise TenfoldInputError(f"{source}: {exc}") from None


def _toml_value(v) -> str:
    if v is None:
        return json.dumps(AUTO)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        # repr is the shortest text that reads back to the same double; TOML accepts it (1e-05, 0.28, 3.0)
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # JSON's escapes are a subset of TOML basic strings
    raise TypeError(f"cannot write {type(v).__name__} to the parameters file")


def parameters_to_toml(params) -> str:
    """The text of a parameters file for ``params`` (a ``Parameters`` or its ``to_dict()``).

    Every key is written, automatic ones as ``"auto"``; floats with the shortest round-tripping text, so
    ``parameters_from_toml(parameters_to_toml(p)) == p``.
    """
    d = params.to_dict() if isinstance(params, Parameters) else dict(params)
    kinds = _field_kinds()
    unknown = sorted(set(d) - set(kinds))
    if unknown:
        raise TenfoldInputError(f"parameters: unknown key(s) {unknown}; known keys: {sorted(kinds)}")
    lines = [
        "# Tenfold analysis parameters. Repeat the run with:",
        "#   tenfold analyze IMAGE --out NEW_FOLDER --params parameters.toml",
        f'# "{AUTO}" = chosen automatically from the image (the choice is recorded in summary.json).',
        f"{_VERSION_KEY} = {FORMAT_VERSION}",
        "",
    ]
    for f in dataclasses.fields(Parameters):
        lines.append(f"{f.name} = {_toml_value(d.get(f.name, f.default))}")
    return "\n".join(lines) + "\n"


def load_parameters(path):
    """Read a parameters file (``parameters.toml``) into validated :class:`Parameters`.

    Parameters
    ----------
    path : str or path-like
        The file; a results folder is accepted too (its ``parameters.toml`` is read).

    Returns
    -------
    Parameters

    Raises
    ------
    TenfoldInputError
        Missing or unreadable file, or any bad key (named in the message).
    """
    p = Path(path)
    if p.is_dir():
        p = p / PARAMETERS_FILE
    if not p.is_file():
        raise TenfoldInputError(f"{p}: no such parameters file; give the parameters.toml of an earlier run")
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise TenfoldInputError(f"{p}: cannot read the parameters file ({exc})") from None
    return parameters_from_toml(text, source=str(p))


def save_parameters(params, path, *, overwrite: bool = False) -> Path:
    """Write ``params`` to a parameters file.

    Parameters
    ----------
    params : Parameters or dict
        What to write (validated first).
    path : str or path-like
        Target file; an existing file is replaced only with ``overwrite=True``.
    overwrite : bool
        Replace an existing file (default False).

    Returns
    -------
    Path
        The file written.
    """
    p = Path(path)
    if p.exists() and not overwrite:
        raise TenfoldInputError(f"{p}: exists; choose another file name or pass overwrite=True")
    params = params if isinstance(params, Parameters) else Parameters.from_dict(dict(params))
    text = parameters_to_toml(params.validate())
    p.write_text(text, encoding="utf-8")
    return p
