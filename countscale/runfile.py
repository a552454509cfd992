"""Read and validate a run file (TOML).

A run file describes one whole job for ``countscale run``: where the catalogue is, which part
of the sky the survey covers, how complete it is, what to fit and what to report. This module
turns the file into a frozen, validated :class:`RunFile`; it builds nothing (footprints,
catalogues and fits are built by their own modules from the validated values).

Topics
------
load_runfile, parse_runfile
    Read a file (or a string, for tests) into a :class:`RunFile`.
RunFile
    ``path``, ``base_dir``, ``present`` (sections written in the file) and one :class:`Table`
    per section, reachable as ``runfile.catalog``, ``runfile.footprint``, ...;
    ``require(...)`` checks that a command's sections are there.
Table
    An immutable mapping with attribute access (``table.ra`` or ``table["ra"]``).
FootprintItem
    One ``include``/``exclude`` item of ``[footprint]``: ``kind`` and its ``params``.
SECTIONS, ITEM_KINDS
    The schema: every section, every key, its validator and its default.

What the validated values look like
-----------------------------------
* Every section of :data:`SECTIONS` is in ``runfile.sections``, whether the file has it or not;
  ``runfile.present`` says which ones the file has. An absent section holds its defaults, and
  ``None`` for keys without a default (its required keys are only required when it is present).
* Every key of a section is in its table; an optional key that was not given is ``None``.
* Relative paths are resolved against the run file's folder (``~`` is expanded) into absolute,
  normalised :class:`pathlib.Path` objects. Glob patterns in ``[catalog].paths`` stay patterns
  (``*``, ``?``, ``[...]`` are kept) but are made absolute the same way.
* Lists become tuples, numbers become ``float`` (or ``int`` for integer keys), pairs such as
  ``fit_range`` become ``(a, b)`` tuples of floats, sub-tables become :class:`Table`.
* Footprint items keep the trade's parameter names with units: ``cap`` gives ``ra_deg``,
  ``dec_deg``, ``radius_deg``; ``box`` gives ``ra_deg=(a, b)`` (``a > b`` wraps through 0) and
  ``dec_deg=(c, d)``; ``polygon`` gives ``vertices_deg`` (a closing vertex equal to the first is
  dropped); ``map``/``moc``/``circles`` give ``path``; galactic-latitude cuts give ``b_deg``;
  ``occupancy`` gives ``order`` and ``min_count``.
* ``[totals].volume`` becomes ``Table(kind="observable_universe", redshift=None)`` or
  ``Table(kind="redshift", redshift=(a, b))``.
* ``[cosmology]`` holds either ``name`` (default ``"Planck18"``) with ``H0 = Om0 = None``, or
  ``H0`` and ``Om0`` with ``name = None``.
* ``[totals].target_sky`` is a tuple of :class:`FootprintItem` (any kind but ``occupancy``), or
  None for the whole sky; :func:`countscale.skymodel.target_sky_footprint` builds it.
  ``[totals].imf`` is a name, or a tuple of names (a mixture); ``[totals].mass_to_light`` a
  :class:`Table` of ``value``, ``sigma_dex``, ``sun_abs_mag`` and ``source``.
* ``[extinction]`` has ``map`` (a path) and exactly one of ``coefficient`` (R) and ``band`` (a
  name of :data:`countscale.extinction.COEFFICIENTS`).
* ``[sky_model].covariate_sets`` is a tuple of tuples of names (None: the defaults for the
  population), checked against the galactic basis, the ``maps`` (tables with ``name``,
  ``path``, ``nest``, ``transform``) and ``ebv`` when there is an ``[extinction]`` section.
* ``[catalog]`` may name a ``classifier`` column and a ``classifier_threshold`` (None: 0.5);
  ``[contamination]`` (galaxies only, not with a classifier) names a ``star_catalog``.

Errors
------
Every problem raises :class:`~countscale.errors.InputError` (wrong value, unknown key, bad
TOML) or :class:`~countscale.errors.InputTypeError` (wrong kind of value) with a one-line
message that names the file, the section and the key path (list items by 0-based index), the
rule and the offending value, e.g.::

    survey.toml: [footprint] unknown key 'max_ordr'; did you mean 'max_order'?
    survey.toml: [counts] 'fit_range' must be two increasing magnitudes; got [25.0, 20.0]
    survey.toml: [footprint] 'include[2].cap.radius' must be a number in (0, 180] degrees; got -3.0
    survey.toml: TOML syntax error at line 3, column 7: Invalid value

How to add a key (or a section, or a footprint kind)
----------------------------------------------------
The schema is data: one entry per key, in one place.

* A key: add ``"new_key": Key(<validator>, default=<TOML value>)`` to its section in
  :data:`SECTIONS`. ``default`` is written as it would be in the file (a relative path, a list)
  and goes through the same validator, so it is normalised like user input. Use
  ``default=REQUIRED`` for a key the section cannot do without, or leave ``default=None`` for
  an optional key that stays ``None``. ``dest=`` renames the key in the validated table (used to
  put units in names: ``radius`` -> ``radius_deg``).
* Validators are built by the small factories below (``_real``, ``_integer``, ``_choice``,
  ``_subset``, ``_pair``, ``_path``, ``_table``, ...): each takes ``(value, where)`` and returns
  the normalised value, raising through ``where.type_error``/``where.value_error`` so the message
  has the file and key path. A rule that links several keys of one section goes in the
  section's ``check`` function; a rule across sections goes in ``_FILE_CHECKS``.
* A section: add ``"name": Section({...})`` to :data:`SECTIONS`.
* A footprint item kind: add an :class:`_Kind` to :data:`ITEM_KINDS` (validator of the kind
  key's value, its parameter name, and any sibling keys such as ``threshold``).
* Add the key to the full run file in ``tests/test_runfile.py`` (a test checks that the full
  file uses every key of the schema) and a bad value to its table of bad inputs.

Examples
--------
>>> rf = parse_runfile('[catalog]\\npaths = ["cat/*.parquet"]\\nra = "RA"\\ndec = "DEC"\\n'
...                    'mag = "MAG_AB"\\n', "/data/survey.toml")
>>> rf.catalog.paths
(PosixPath('/data/cat/*.parquet'),)
>>> rf.catalog.population, rf.engine.chunk_rows
('galaxies', 2000000)
>>> rf.require("footprint")
Traceback (most recent call last):
...
countscale.errors.InputError: /data/survey.toml: missing required section [footprint]
"""

from __future__ import annotations

import difflib
import json
import math
import os
import re
import tomllib
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from countscale.errors import InputError, InputTypeError

__all__ = [
    "ITEM_KINDS",
    "MAX_BINS",
    "MAX_ORDER",
    "MAX_REGIONS",
    "REQUIRED",
    "SECTIONS",
    "FootprintItem",
    "Key",
    "RunFile",
    "Section",
    "Table",
    "load_runfile",
    "parse_runfile",
]


# --------------------------------------------------------------------------------------------
# Immutable containers
# --------------------------------------------------------------------------------------------


class Table(Mapping[str, Any]):
    """An immutable mapping with attribute access, holding one validated (sub-)table.

    ``table["ra"]`` and ``table.ra`` are the same value. Tables compare equal to any mapping
    with the same items and are hashable (all validated values are).
    """

    __slots__ = ("_data",)

    def __init__(self, data: Mapping[str, Any] | Iterable[tuple[str, Any]] = (), /, **items: Any):
        object.__setattr__(self, "_data", dict(data, **items))

    def __getitem__(self, key: str) -> Any:
        return self._data[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __getattr__(self, name: str) -> Any:
        # Private names never come from the data; this also keeps copy/pickle from recursing
        # before ``_data`` exists.
        if name.startswith("_"):
            raise AttributeError(name)
        try:
            return self._data[name]
        except KeyError:
            raise AttributeError(f"table has no key {name!r}; keys: {list(self._data)}") from None

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("a run-file table is read-only")

    def __delattr__(self, name: str) -> None:
        raise AttributeError("a run-file table is read-only")

    def __hash__(self) -> int:
        return hash(tuple(self._data.items()))

    def __reduce__(self) -> tuple[Any, ...]:
        return (Table, (self._data,))

    def __repr__(self) -> str:
        inner = ", ".join(f"{key}={value!r}" for key, value in self._data.items())
        return f"Table({inner})"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready copy: nested tables as dicts, tuples as lists, paths as strings."""
        return {key: _plain(value) for key, value in self._data.items()}


@dataclass(frozen=True)
class FootprintItem:
    """One validated ``include`` or ``exclude`` item of ``[footprint]``.

    Attributes
    ----------
    kind : str
        The item's kind key: one of :data:`ITEM_KINDS` (``"cap"``, ``"map"``, ...).
    params : Table
        The kind's parameters, normalised (names carry units: ``radius_deg``, ``b_deg``).
    where : str
        Where the item is, for messages: ``"survey.toml: [footprint] 'include[2]'"``.
    """

    kind: str
    params: Table
    where: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready copy: ``{"kind": ..., **params}``."""
        return {"kind": self.kind, **self.params.to_dict()}


def _plain(value: Any) -> Any:
    """Turn validated values into JSON-ready ones (tables -> dicts, tuples -> lists)."""
    if isinstance(value, Table | FootprintItem):
        return value.to_dict()
    if isinstance(value, tuple | list):
        return [_plain(item) for item in value]
    if isinstance(value, Path):
        return str(value)
    return value


def _freeze(value: Any) -> Any:
    """Make a free-form TOML value immutable (tables -> Table, arrays -> tuples)."""
    if isinstance(value, dict):
        return Table({key: _freeze(item) for key, item in value.items()})
    if isinstance(value, list):
        return tuple(_freeze(item) for item in value)
    return value


# --------------------------------------------------------------------------------------------
# Where a value sits, and the messages that name it
# --------------------------------------------------------------------------------------------


def _show(value: Any, limit: int = 80) -> str:
    """Render a TOML value the way the user wrote it (true, "text", [1, 2], {a = 1})."""
    text = _show_full(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _show_full(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_show_full(item) for item in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{k} = {_show_full(v)}" for k, v in value.items()) + "}"
    if isinstance(value, float):
        return repr(value)
    return str(value)


def _number(x: float) -> str:
    """A bound for a rule text: 180 rather than 180.0."""
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def _did_you_mean(word: str, choices: Iterable[str], quote: Callable[[str], str]) -> str:
    """``"; did you mean 'x'?"`` for the closest choice, or ``""`` when nothing is close."""
    # Compare case-insensitively ('h0' -> 'H0'), then map back to the real spelling.
    lowered = {choice.lower(): choice for choice in choices}
    close = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)
    return f"; did you mean {quote(lowered[close[0]])}?" if close else ""


def _suggest(word: str, choices: Iterable[str], quote: Callable[[str], str]) -> str:
    """``"; did you mean 'x'?"``, or the list of choices when nothing is close."""
    choices = list(choices)
    return _did_you_mean(word, choices, quote) or "; expected one of " + ", ".join(
        quote(choice) for choice in choices
    )


def _quote_key(key: str) -> str:
    return f"'{key}'"


def _quote_section(name: str) -> str:
    return f"[{name}]"


@dataclass(frozen=True)
class _Where:
    """The place of a value in the run file: file label, section and key path."""

    label: str
    base_dir: Path
    section: str | None = None
    keys: tuple[str | int, ...] = ()

    def key(self, name: str) -> _Where:
        return replace(self, keys=(*self.keys, name))

    def item(self, index: int) -> _Where:
        return replace(self, keys=(*self.keys, index))

    def in_section(self, name: str) -> _Where:
        return replace(self, section=name, keys=())

    @property
    def dotted(self) -> str:
        """The key path inside the section: ``include[2].cap.radius``."""
        text = ""
        for key in self.keys:
            if isinstance(key, int):
                text += f"[{key}]"
            else:
                text += f".{key}" if text else key
        return text

    @property
    def prefix(self) -> str:
        """``survey.toml: [footprint]`` (without the key path)."""
        return f"{self.label}: [{self.section}]" if self.section else f"{self.label}:"

    def __str__(self) -> str:
        return f"{self.prefix} '{self.dotted}'" if self.keys else self.prefix

    def type_error(self, rule: str, value: Any) -> InputTypeError:
        return InputTypeError(f"{self} {rule}; got {_show(value)}")

    def value_error(self, rule: str, value: Any, hint: str = "") -> InputError:
        return InputError(f"{self} {rule}; got {_show(value)}{hint}")

    def unknown_key(self, key: str, allowed: Iterable[str]) -> InputError:
        return InputError(
            f"{self.prefix} unknown key '{self.key(key).dotted}'"
            + _suggest(key, allowed, _quote_key)
        )

    def missing_key(self, key: str) -> InputError:
        return InputError(f"{self.prefix} missing required key '{self.key(key).dotted}'")


# --------------------------------------------------------------------------------------------
# Schema machinery
# --------------------------------------------------------------------------------------------

Check = Callable[[Any, _Where], Any]


class _Required:
    """Marker for a key that must be given whenever its section (or table) is present."""

    def __repr__(self) -> str:
        return "REQUIRED"


REQUIRED = _Required()


@dataclass(frozen=True)
class Key:
    """One key of the schema.

    Attributes
    ----------
    check : callable
        ``check(value, where) -> normalised value``; raises through ``where``.
    default : object
        A TOML-style default, validated by ``check`` like user input; ``None`` for an optional
        key without default (stays ``None``); :data:`REQUIRED` for a required key.
    dest : str or None
        Name in the validated table, when it differs from the TOML key (units in names).
    """

    check: Check
    default: Any = None
    dest: str | None = None


@dataclass(frozen=True)
class Section:
    """One section of the schema: its keys, and an optional rule linking several of them.

    ``check(table, where) -> table`` runs after every key is validated (also for an absent
    section, whose optional values are ``None``) and may return a completed table.
    """

    keys: Mapping[str, Key]
    check: Callable[[Table, _Where], Table] | None = None


def _validate_keys(
    raw: Mapping[str, Any], keys: Mapping[str, Key], where: _Where, *, enforce_required: bool
) -> Table:
    """Check one TOML table against a key schema; fill defaults; return a Table."""
    for name in raw:
        if name not in keys:
            raise where.unknown_key(name, keys)
    out: dict[str, Any] = {}
    for name, key in keys.items():
        dest = key.dest or name
        if name in raw:
            out[dest] = key.check(raw[name], where.key(name))
        elif key.default is REQUIRED:
            if enforce_required:
                raise where.missing_key(name)
            out[dest] = None
        elif key.default is None:
            out[dest] = None
        else:
            out[dest] = key.check(key.default, where.key(name))
    return Table(out)


# --------------------------------------------------------------------------------------------
# Validators (factories returning check(value, where) -> normalised value)
# --------------------------------------------------------------------------------------------


def _is_number(value: Any) -> bool:
    # TOML booleans are Python bools, which are ints: never accept them as numbers.
    return isinstance(value, int | float) and not isinstance(value, bool)


def _range_text(
    lo: float | None, hi: float | None, *, lo_open: bool = False, hi_open: bool = False
) -> str:
    if lo is not None and hi is not None:
        left, right = "(" if lo_open else "[", ")" if hi_open else "]"
        return f" in {left}{_number(lo)}, {_number(hi)}{right}"
    if lo is not None:
        return f" {'>' if lo_open else '>='} {_number(lo)}"
    if hi is not None:
        return f" {'<' if hi_open else '<='} {_number(hi)}"
    return ""


def _in_range(
    x: float, lo: float | None, hi: float | None, lo_open: bool = False, hi_open: bool = False
) -> bool:
    if lo is not None and (x <= lo if lo_open else x < lo):
        return False
    return not (hi is not None and (x >= hi if hi_open else x > hi))


def _text(rule: str = "must be a non-empty string") -> Check:
    def check(value: Any, where: _Where) -> str:
        if not isinstance(value, str):
            raise where.type_error(rule, value)
        if not value.strip():
            raise where.value_error(rule, value)
        return value

    return check


_column = _text("must be a column name (a non-empty string)")


def _path(rule: str = "must be a file path (a non-empty string)") -> Check:
    text = _text(rule)

    def check(value: Any, where: _Where) -> Path:
        path = Path(text(value, where)).expanduser()
        if not path.is_absolute():
            path = where.base_dir / path
        # abspath normalises "a/../b" without touching glob characters or following links.
        return Path(os.path.abspath(path))

    return check


def _boolean() -> Check:
    rule = "must be true or false"

    def check(value: Any, where: _Where) -> bool:
        if not isinstance(value, bool):
            raise where.type_error(rule, value)
        return value

    return check


def _integer(lo: int | None = None, hi: int | None = None) -> Check:
    rule = "must be an integer" + _range_text(lo, hi)

    def check(value: Any, where: _Where) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise where.type_error(rule, value)
        if not _in_range(value, lo, hi):
            raise where.value_error(rule, value)
        return value

    return check


def _real(
    lo: float | None = None,
    hi: float | None = None,
    *,
    lo_open: bool = False,
    hi_open: bool = False,
    unit: str = "",
) -> Check:
    bounds = _range_text(lo, hi, lo_open=lo_open, hi_open=hi_open)
    rule = ("must be a number" + bounds if bounds else "must be a finite number") + (
        f" {unit}" if unit else ""
    )

    def check(value: Any, where: _Where) -> float:
        if not _is_number(value):
            raise where.type_error(rule, value)
        x = float(value)
        if not math.isfinite(x) or not _in_range(x, lo, hi, lo_open, hi_open):
            raise where.value_error(rule, value)
        return x

    return check


def _choice(options: Iterable[str]) -> Check:
    options = tuple(options)
    rule = "must be one of " + ", ".join(f'"{option}"' for option in options)

    def check(value: Any, where: _Where) -> str:
        if not isinstance(value, str):
            raise where.type_error(rule, value)
        if value not in options:
            # The rule already lists the options; only a close match adds anything.
            raise where.value_error(rule, value, _did_you_mean(value, options, _show))
        return value

    return check


def _subset(options: Iterable[str]) -> Check:
    options = tuple(options)
    names = ", ".join(f'"{option}"' for option in options)
    rule = f"must be a non-empty list of distinct names from {names}"
    one = _choice(options)

    def check(value: Any, where: _Where) -> tuple[str, ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        names = tuple(one(item, where.item(i)) for i, item in enumerate(value))
        if not names or len(set(names)) != len(names):
            raise where.value_error(rule, value)
        return names

    return check


def _list_of(item: Check, *, min_len: int, rule: str) -> Check:
    def check(value: Any, where: _Where) -> tuple[Any, ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        if len(value) < min_len:
            raise where.value_error(rule, value)
        return tuple(item(entry, where.item(i)) for i, entry in enumerate(value))

    return check


def _pair(
    rule: str,
    *,
    lo: float | None = None,
    hi: float | None = None,
    increasing: bool = True,
) -> Check:
    """Two finite numbers ``[a, b]`` within ``[lo, hi]``; ``a < b`` if increasing, else a != b."""

    def check(value: Any, where: _Where) -> tuple[float, float]:
        if not isinstance(value, list) or not all(_is_number(x) for x in value):
            raise where.type_error(rule, value)
        if len(value) != 2:
            raise where.value_error(rule, value)
        a, b = float(value[0]), float(value[1])
        ok = all(math.isfinite(x) and _in_range(x, lo, hi) for x in (a, b))
        if not ok or (a >= b if increasing else a == b):
            raise where.value_error(rule, value)
        return (a, b)

    return check


def _table(
    keys: Mapping[str, Key],
    *,
    rule: str = "must be a table",
    check: Callable[[Table, _Where], Table] | None = None,
) -> Check:
    def validate(value: Any, where: _Where) -> Table:
        if not isinstance(value, dict):
            raise where.type_error(rule, value)
        table = _validate_keys(value, keys, where, enforce_required=True)
        return check(table, where) if check is not None else table

    return validate


def _free_table() -> Check:
    rule = "must be a table"

    def check(value: Any, where: _Where) -> Table:
        if not isinstance(value, dict):
            raise where.type_error(rule, value)
        return _freeze(value)

    return check


def _numbers(rule: str) -> Check:
    def check(value: Any, where: _Where) -> tuple[float, ...]:
        if not isinstance(value, list) or not all(_is_number(x) for x in value):
            raise where.type_error(rule, value)
        if not all(math.isfinite(x) for x in value):
            raise where.value_error(rule, value)
        return tuple(float(x) for x in value)

    return check


def _cosmology_name() -> Check:
    def check(value: Any, where: _Where) -> str:
        # The names astropy ships (Planck18, WMAP9, ...); imported here so that reading a run
        # file without [cosmology].name does not pay for importing astropy.cosmology.
        from astropy.cosmology import realizations

        return _choice(realizations.available)(value, where)

    return check


def _volume() -> Check:
    rule = 'must be "observable_universe" or a table {redshift = [a, b]} with 0 <= a < b'
    shell = {"redshift": Key(_pair(_REDSHIFT_RULE, lo=0.0), REQUIRED)}

    def check(value: Any, where: _Where) -> Table:
        if isinstance(value, str):
            if value != "observable_universe":
                hint = _did_you_mean(value, ["observable_universe"], _show)
                raise where.value_error(rule, value, hint)
            return Table(kind="observable_universe", redshift=None)
        if isinstance(value, dict):
            table = _validate_keys(value, shell, where, enforce_required=True)
            return Table(kind="redshift", redshift=table.redshift)
        raise where.type_error(rule, value)

    return check


_IMF_NAMES = ("kroupa", "chabrier", "salpeter")


def _imf_choice() -> Check:
    one = _choice(_IMF_NAMES)
    several = _subset(_IMF_NAMES)
    rule = ("must be an IMF name or a list of distinct IMF names from "
            + ", ".join(f'"{n}"' for n in _IMF_NAMES))

    def check(value: Any, where: _Where) -> str | tuple[str, ...]:
        if isinstance(value, str):
            return one(value, where)
        if isinstance(value, list):
            return several(value, where)
        raise where.type_error(rule, value)

    return check


def _power_of_two(lo: int, hi: int) -> Check:
    rule = f"must be a power of 2 in [{lo}, {hi}]"

    def check(value: Any, where: _Where) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise where.type_error(rule, value)
        if not (lo <= value <= hi and value & (value - 1) == 0):
            raise where.value_error(rule, value)
        return value

    return check


def _extinction_band() -> Check:
    def check(value: Any, where: _Where) -> str:
        # Imported here: reading a run file without [extinction] does not load healpy.
        from countscale.extinction import COEFFICIENTS

        return _choice(COEFFICIENTS)(value, where)

    return check


_NAME_RULE = "must be a covariate name (a non-empty string)"


def _covariate_sets() -> Check:
    rule = ("must be a list of covariate sets, each a list of distinct covariate names "
            "(an empty list: a constant density)")

    def one_set(value: Any, where: _Where) -> tuple[str, ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        names = tuple(_text(_NAME_RULE)(item, where.item(i)) for i, item in enumerate(value))
        if len(set(names)) != len(names):
            raise where.value_error("must not repeat a covariate", value)
        return names

    def check(value: Any, where: _Where) -> tuple[tuple[str, ...], ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        if not value:
            raise where.value_error(rule, value)
        sets = tuple(one_set(item, where.item(i)) for i, item in enumerate(value))
        if len({frozenset(x) for x in sets}) != len(sets):
            raise where.value_error("must not list the same covariate set twice", value)
        return sets

    return check


def _covariate_maps() -> Check:
    item = _table(
        {
            "name": Key(_text(_NAME_RULE), REQUIRED),
            "path": Key(_path(), REQUIRED),
            "nest": Key(_boolean()),
            "transform": Key(_choice(["linear", "log"]), "linear"),
        },
        rule="must be a table {name = , path = } (optional nest, transform)",
    )
    rule = "must be a list of covariate maps {name = , path = }"

    def check(value: Any, where: _Where) -> tuple[Table, ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        maps = tuple(item(entry, where.item(i)) for i, entry in enumerate(value))
        names = [m.name for m in maps]
        for i, name in enumerate(names):
            if name in names[:i]:
                raise where.item(i).key("name").value_error("must differ from the other maps'",
                                                            name)
        return maps

    return check


_REDSHIFT_RULE = "must be two increasing redshifts [a, b] with 0 <= a < b"

#: Finest HEALPix order of a footprint. The IVOA MOC standard (v2.0, 2022) goes to 29, but the
#: footprint measures a boundary cell at order k from its sub-cells at order k + 1, and healpy
#: accepts nside only up to 2**29: order 29 cannot be built (order 28 cells are 0.8 mas across).
MAX_ORDER = 28

#: Most jackknife regions: each region costs a refit of every count model (the demo survey took
#: 18 s with 100 regions and 26 s with 400; 10^5 regions ran for 14 minutes).
MAX_REGIONS = 1000

#: Most magnitude bins in [counts].bins: the forward model holds a (bins x 0.01 mag cells)
#: response matrix, and 1000 bins is already a 0.01 mag grid over 10 mag.
MAX_BINS = 1000
_RA_DEG = _real(0.0, 360.0, unit="degrees")
_DEC_DEG = _real(-90.0, 90.0, unit="degrees")


# --------------------------------------------------------------------------------------------
# Footprint items
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Kind:
    """A footprint item kind.

    ``value`` validates the kind key's value; ``dest`` names it in ``params`` (``None``: the
    value is a table whose keys go into ``params`` directly); ``extras`` are the sibling keys
    the kind allows beside its kind key (``threshold`` beside ``map``).
    """

    value: Check
    dest: str | None
    extras: Mapping[str, Key] = field(default_factory=dict)


def _polygon() -> Check:
    rule = "must be a list of at least 3 vertices [ra, dec] in degrees"
    vertex_rule = "must be a vertex [ra, dec] with ra in [0, 360] and dec in [-90, 90] degrees"

    def vertex(value: Any, where: _Where) -> tuple[float, float]:
        if not isinstance(value, list) or not all(_is_number(x) for x in value):
            raise where.type_error(vertex_rule, value)
        if len(value) != 2:
            raise where.value_error(vertex_rule, value)
        ra, dec = float(value[0]), float(value[1])
        if not (math.isfinite(ra) and math.isfinite(dec)):
            raise where.value_error(vertex_rule, value)
        if not (_in_range(ra, 0.0, 360.0) and _in_range(dec, -90.0, 90.0)):
            raise where.value_error(vertex_rule, value)
        return (ra, dec)

    def check(value: Any, where: _Where) -> tuple[tuple[float, float], ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        vertices = tuple(vertex(v, where.item(i)) for i, v in enumerate(value))
        # A ring closed by repeating its first vertex is the same polygon: drop the repeat.
        if len(vertices) > 1 and vertices[-1] == vertices[0]:
            vertices = vertices[:-1]
        if len(vertices) < 3:
            raise where.value_error(rule, value)
        return vertices

    return check


ITEM_KINDS: dict[str, _Kind] = {
    # A HEALPix map (FITS, any nside): boolean, fractional coverage or hit counts. threshold
    # and nest are handed to the builder; None leaves the choice to it (nest None: read the
    # ORDERING header).
    "map": _Kind(
        _path(),
        "path",
        {"threshold": Key(_real()), "nest": Key(_boolean())},
    ),
    "moc": _Kind(_path(), "path"),
    "cap": _Kind(
        _table(
            {
                "ra": Key(_RA_DEG, REQUIRED, dest="ra_deg"),
                "dec": Key(_DEC_DEG, REQUIRED, dest="dec_deg"),
                "radius": Key(
                    _real(0.0, 180.0, lo_open=True, unit="degrees"), REQUIRED, dest="radius_deg"
                ),
            },
            rule="must be a table {ra = , dec = , radius = } in degrees",
        ),
        None,
    ),
    "box": _Kind(
        _table(
            {
                "ra": Key(
                    _pair(
                        "must be two right ascensions [a, b] in [0, 360] degrees with a != b"
                        " (a > b wraps through 0)",
                        lo=0.0,
                        hi=360.0,
                        increasing=False,
                    ),
                    REQUIRED,
                    dest="ra_deg",
                ),
                "dec": Key(
                    _pair(
                        "must be two increasing declinations [c, d] in [-90, 90] degrees",
                        lo=-90.0,
                        hi=90.0,
                    ),
                    REQUIRED,
                    dest="dec_deg",
                ),
            },
            rule="must be a table {ra = [a, b], dec = [c, d]} in degrees",
        ),
        None,
    ),
    "polygon": _Kind(_polygon(), "vertices_deg"),
    "circles": _Kind(
        _path(),
        "path",
        {
            "columns": Key(
                _table(
                    {
                        "ra": Key(_column, "ra"),
                        "dec": Key(_column, "dec"),
                        "radius_arcsec": Key(_column, "radius_arcsec"),
                    }
                ),
                {},
            )
        },
    ),
    "galactic_latitude_below": _Kind(_real(0.0, 90.0, unit="degrees"), "b_deg"),
    "galactic_latitude_above": _Kind(_real(0.0, 90.0, unit="degrees"), "b_deg"),
    # Cells (at HEALPix `order`) of the catalogue holding at least `min_count` sources.
    "occupancy": _Kind(
        _table(
            {"order": Key(_integer(0, MAX_ORDER), REQUIRED), "min_count": Key(_integer(1), 1)},
            rule="must be a table {order = , min_count = }",
        ),
        None,
    ),
}


def _footprint_item(raw: Any, where: _Where) -> FootprintItem:
    kind_names = ", ".join(f"'{kind}'" for kind in ITEM_KINDS)
    rule = f"must be a table with exactly one kind key, one of {kind_names}"
    if not isinstance(raw, dict):
        raise where.type_error(rule, raw)
    kinds = [key for key in raw if key in ITEM_KINDS]
    if not kinds:
        every_extra = {name for spec in ITEM_KINDS.values() for name in spec.extras}
        for key in raw:
            if key not in every_extra:
                raise where.unknown_key(key, [*ITEM_KINDS, *sorted(every_extra)])
        keys = ", ".join(f"'{key}'" for key in raw)
        got = f"none (keys: {keys})" if raw else "an empty table {}"
        raise InputError(f"{where} {rule}; got {got}")
    if len(kinds) > 1:
        found = " and ".join(f"'{kind}'" for kind in kinds)
        raise InputError(f"{where} {rule}; got {found}")
    kind = kinds[0]
    spec = ITEM_KINDS[kind]
    for key in raw:
        if key != kind and key not in spec.extras:
            raise where.unknown_key(key, [kind, *spec.extras])
    value = spec.value(raw[kind], where.key(kind))
    params = dict(value) if spec.dest is None else {spec.dest: value}
    extras = {key: raw[key] for key in raw if key != kind}
    params.update(_validate_keys(extras, spec.extras, where, enforce_required=True))
    return FootprintItem(kind=kind, params=Table(params), where=str(where))


def _footprint_items(*, min_len: int) -> Check:
    rule = "must be a list of footprint items such as {cap = {ra = , dec = , radius = }}" + (
        f" (at least {min_len})" if min_len else ""
    )

    def check(value: Any, where: _Where) -> tuple[FootprintItem, ...]:
        if not isinstance(value, list):
            raise where.type_error(rule, value)
        if len(value) < min_len:
            raise where.value_error(rule, value)
        return tuple(_footprint_item(item, where.item(i)) for i, item in enumerate(value))

    return check


#: Footprint kinds a target sky may use: those that describe sky, not the catalogue.
_TARGET_KINDS = tuple(kind for kind in ITEM_KINDS if kind != "occupancy")


def _target_sky_items() -> Check:
    items = _footprint_items(min_len=1)

    def check(value: Any, where: _Where) -> tuple[FootprintItem, ...]:
        checked = items(value, where)
        for i, item in enumerate(checked):
            if item.kind not in _TARGET_KINDS:
                raise InputError(
                    f"{where.item(i)} must be a sky shape, one of "
                    + ", ".join(f"'{k}'" for k in _TARGET_KINDS)
                    + f"; got '{item.kind}' (it describes the catalogue, not a target)"
                )
        return checked

    return check


# --------------------------------------------------------------------------------------------
# Rules linking keys of one section
# --------------------------------------------------------------------------------------------


def _check_catalog(table: Table, where: _Where) -> Table:
    if table.classifier_threshold is not None and table.classifier is None:
        raise where.key("classifier_threshold").value_error(
            "needs a 'classifier' column", table.classifier_threshold)
    return table


def _check_extinction(table: Table, where: _Where) -> Table:
    if table.map is None:  # section absent
        return table
    if (table.coefficient is None) == (table.band is None):
        given = "both" if table.coefficient is not None else "neither"
        raise InputError(f"{where.prefix} needs exactly one of 'coefficient' (R = A / E(B-V)) "
                         f"and 'band'; got {given}")
    return table


def _check_footprint(table: Table, where: _Where) -> Table:
    # An occupancy map finer than the footprint's finest order cannot be represented.
    for list_name in ("include", "exclude"):
        for i, item in enumerate(table[list_name] or ()):
            if item.kind == "occupancy" and item.params.order > table.max_order:
                raise (
                    where.key(list_name)
                    .item(i)
                    .key("occupancy")
                    .key("order")
                    .value_error(f"must be <= max_order ({table.max_order})", item.params.order)
                )
    return table


def _check_bins(bins: Table, where: _Where) -> Table:
    if bins.stop <= bins.start:
        raise where.key("stop").value_error(
            f"must be greater than start ({_number(bins.start)})", bins.stop
        )
    span = bins.stop - bins.start
    n_bins = span / bins.width
    if n_bins > MAX_BINS * (1 + 1e-9):
        raise where.key("width").value_error(
            f"must divide stop - start ({_number(span)}) into at most {MAX_BINS} bins "
            f"(it gives {n_bins:.3g})", bins.width
        )
    # Bins must tile [start, stop] exactly, so no magnitude range is silently dropped; the
    # tolerance absorbs binary rounding of decimal widths such as 0.1.
    if n_bins < 1 - 1e-9 or abs(n_bins - round(n_bins)) > 1e-9 * max(1.0, n_bins):
        raise where.key("width").value_error(
            f"must divide stop - start ({_number(span)}) into a whole number of bins", bins.width
        )
    return bins


def _check_counts(table: Table, where: _Where) -> Table:
    if table.fit_range is not None and table.bins is not None:
        start, stop = table.bins.start, table.bins.stop
        a, b = table.fit_range
        if a < start or b > stop:
            raise where.key("fit_range").value_error(
                f"must lie within the bins [{_number(start)}, {_number(stop)}]",
                list(table.fit_range),
            )
    return table


def _check_luminosity_function(table: Table, where: _Where) -> Table:
    if table.quantity is None:  # section absent
        return table
    if table.model == "double_schechter" and table.quantity != "stellar_mass":
        raise where.key("model").value_error(
            'is a stellar-mass form (Baldry et al. 2012); it needs quantity = "stellar_mass"',
            table.model,
        )
    if table.quantity == "stellar_mass":
        if table.fit_evolution is not None:
            raise where.key("fit_evolution").value_error(
                'applies to luminosity functions; quantity is "stellar_mass"',
                list(table.fit_evolution),
            )
        if table.evolution.Q != 0:
            raise where.key("evolution").value_error(
                'Q applies to luminosity functions (quantity is "stellar_mass"); give Q = 0',
                table.evolution.Q,
            )
    return table


def _check_cosmology(table: Table, where: _Where) -> Table:
    has_params = table.H0 is not None or table.Om0 is not None
    if table.name is not None and has_params:
        given = "H0" if table.H0 is not None else "Om0"
        raise InputError(
            f"{where.prefix} give either 'name' or 'H0' and 'Om0', not both;"
            f" got name = {_show(table.name)} and {given} = {_show(table[given])}"
        )
    if has_params and (table.H0 is None or table.Om0 is None):
        given, missing = ("H0", "Om0") if table.H0 is not None else ("Om0", "H0")
        raise InputError(
            f"{where.prefix} 'H0' and 'Om0' go together; got {given} = {_show(table[given])}"
            f" and no '{missing}'"
        )
    if not has_params and table.name is None:
        # Planck Collaboration 2020, A&A 641, A6 (Table 2), as shipped by astropy.
        return Table(table, name="Planck18")
    return table


def _check_engine(table: Table, where: _Where) -> Table:
    if table.scheduler is not None and table.kind != "dask":
        raise where.key("scheduler").value_error(
            f'is only used with kind = "dask"; kind is {_show(table.kind)}', table.scheduler
        )
    return table


# --------------------------------------------------------------------------------------------
# The schema: every section and key of a run file (documented in docs/reference.md)
# --------------------------------------------------------------------------------------------

SECTIONS: dict[str, Section] = {
    "survey": Section(
        {
            "name": Key(_text(), REQUIRED),
            "description": Key(_text()),
        }
    ),
    "catalog": Section(
        {
            "paths": Key(
                _list_of(
                    _path("must be a file path or glob pattern (a non-empty string)"),
                    min_len=1,
                    rule="must be a list of file paths or glob patterns (at least one)",
                ),
                REQUIRED,
            ),
            "ra": Key(_column, REQUIRED),
            "dec": Key(_column, REQUIRED),
            "mag": Key(_column, REQUIRED),
            "redshift": Key(_column),
            "mag_error": Key(_column),
            "stellar_mass": Key(_column),
            "id": Key(_column),
            "weight": Key(_column),
            "population": Key(_choice(["galaxies", "stars"]), "galaxies"),
            # Star/galaxy classifier: probability of being a star (or a 0/1 flag) and the
            # value from which a source counts as a star (default 0.5 in the catalogue reader).
            "classifier": Key(_column),
            "classifier_threshold": Key(_real(0.0, 1.0, lo_open=True)),
            # Magnitudes that catalogues use to mean "no measurement"; common figures, no
            # source.
            "sentinels": Key(
                _numbers("must be a list of finite numbers (magnitudes meaning 'no measurement')"),
                [99, -99, 99.99],
            ),
            "require_redshift": Key(_boolean(), False),
            # Plausible magnitudes (AB): finite magnitudes outside are rejected as
            # `mag_implausible` in the row ledger. The same default as
            # countscale.catalog.DEFAULT_MAG_RANGE (kept here so that reading a run file does
            # not import the catalogue readers); a test checks that the two agree.
            "mag_range": Key(
                _pair("must be two magnitudes [lo, hi] with lo < hi (the plausible range, AB)"),
                [-30.0, 40.0],
            ),
            # 1-sigma redshift errors (photometric redshifts): the luminosity-function fit
            # then convolves its model with them.
            "redshift_error": Key(_column),
        },
        check=_check_catalog,
    ),
    "footprint": Section(
        {
            # Order 16 cells are about 3.2 arcsec across (HEALPix: Gorski et al. 2005, ApJ
            # 622, 759). The bound is MAX_ORDER (28), not the MOC standard's 29: see there.
            "max_order": Key(_integer(0, MAX_ORDER), 16),
            "include": Key(_footprint_items(min_len=1), REQUIRED),
            "exclude": Key(_footprint_items(min_len=0), []),
        },
        check=_check_footprint,
    ),
    "completeness": Section(
        {
            "injections": Key(_path(), REQUIRED),
            "model": Key(_choice(["logistic", "fleming", "monotone"]), "logistic"),
            "plateau": Key(_boolean(), False),
            "depth_map": Key(_path()),
            "columns": Key(
                _table(
                    {
                        "mag": Key(_column, "mag"),
                        "recovered": Key(_column, "recovered"),
                        # Optional: without a mapping, columns named "ra" and "dec" are used
                        # when the table has them (to place injections on the depth map);
                        # a mapped name must exist.
                        "ra": Key(_column),
                        "dec": Key(_column),
                    }
                ),
                {},
            ),
        }
    ),
    "counts": Section(
        {
            "bins": Key(
                _table(
                    {
                        "start": Key(_real(), REQUIRED),
                        "stop": Key(_real(), REQUIRED),
                        "width": Key(_real(0.0, lo_open=True), REQUIRED),
                    },
                    rule="must be a table {start = , stop = , width = } in magnitudes",
                    check=_check_bins,
                ),
                REQUIRED,
            ),
            "model": Key(
                _choice(["power_law", "broken_power_law", "double_power_law"]), "power_law"
            ),
            "fit_range": Key(_pair("must be two increasing magnitudes")),
            "reference_mag": Key(_real()),
            # Parametric-bootstrap redraws behind each fit's goodness-of-fit p-value (0: no
            # p-value). They are most of a count fit's time; 200 resolve p to about 0.03.
            "n_bootstrap": Key(_integer(0, 100_000), 200),
        },
        check=_check_counts,
    ),
    "luminosity_function": Section(
        {
            "methods": Key(_subset(["vmax", "sty", "swml"]), ["vmax", "sty", "swml"]),
            "redshift_range": Key(_pair(_REDSHIFT_RULE, lo=0.0), REQUIRED),
            "mag_limits": Key(
                _pair("must be two magnitudes [bright, faint] with bright < faint"), REQUIRED
            ),
            "kcorrection": Key(_free_table()),
            # Luminosity (Q, mag per unit redshift) and density (P) evolution in the form of
            # Lin et al. 1999, ApJ 518, 533 (eq. 5); 0 and 0 mean no evolution.
            "evolution": Key(_table({"Q": Key(_real(), 0.0), "P": Key(_real(), 0.0)}), {}),
            # What is estimated: the luminosity function, or the stellar-mass function of
            # the [catalog] 'stellar_mass' column (log10 Msun).
            "quantity": Key(_choice(["luminosity", "stellar_mass"]), "luminosity"),
            # The form STY fits; double_schechter is Baldry et al. 2012 (MNRAS 421, 621, eq. 6).
            "model": Key(_choice(["schechter", "double_schechter"]), "schechter"),
            # Evolution parameters fitted instead of fixed (their `evolution` values start the
            # fit): Q jointly with the shape, P from the redshift distribution.
            "fit_evolution": Key(_subset(["Q", "P"])),
            # Bins of 1/Vmax and SWML; default 0.25 mag or 0.1 dex (choice of this project).
            "bin_width": Key(_real(0.0, lo_open=True)),
            # Largest completeness weight 1 / completeness (completeness below 1 / weight_cap
            # is not fully corrected, and the report says how many sources that touches).
            "weight_cap": Key(_real(1.0), 5.0),
            # Mass-to-light percentile that sets the mass-completeness limit per redshift.
            "mass_limit_quantile": Key(_real(0.5, 1.0, hi_open=True), 0.95),
        },
        check=_check_luminosity_function,
    ),
    "variance": Section(
        {
            "methods": Key(_subset(["jackknife", "analytic"]), ["jackknife", "analytic"]),
            "regions": Key(_integer(2, MAX_REGIONS), 24),
            "bias": Key(_real(0.0, lo_open=True), 1.0),
            # A parametric n(z) with this median (Smail et al. 1994, MNRAS 270, 245 form)
            # instead of the luminosity function's or the catalogue's redshifts.
            "redshift_median": Key(_real(0.0, 20.0, lo_open=True)),
            # Magnitude limit of the headline values (default: the counts' faint limit).
            "mag_limit": Key(_real()),
            # Power-spectrum normalisation and tilt (default: the cosmology's own, else
            # Planck 2018's); baryon wiggles in the Eisenstein & Hu transfer function.
            "sigma8": Key(_real(0.0, 3.0, lo_open=True)),
            "n_s": Key(_real(0.0, 2.0, lo_open=True, hi_open=True)),
            "wiggles": Key(_boolean(), True),
        }
    ),
    "totals": Section(
        {
            "whole_sky_mag_limit": Key(_real()),
            "volume": Key(_volume()),
            # Absolute magnitude (luminosity function: brighter than it) or log10 stellar mass
            # in Msun (mass function: more massive) of the volume and light-cone totals.
            "faint_limit": Key(_real()),
            "stars": Key(_boolean(), False),
            # The IMF whose stars are counted; a list makes the IMF choice a mixture in the
            # budget. Chabrier 2003, PASP 115, 763: the IMF most stellar-mass catalogues assume.
            "imf": Key(_imf_choice(), "chabrier"),
            # The IMF the stellar masses (catalogue masses or the mass-to-light ratio) were
            # derived with.
            "mass_imf": Key(_choice(_IMF_NAMES), "chabrier"),
            # Stars from a luminosity function: its luminosity density times this ratio.
            "mass_to_light": Key(
                _table(
                    {
                        "value": Key(_real(0.0, lo_open=True, unit="(Msun / Lsun)"), REQUIRED),
                        "sigma_dex": Key(_real(0.0, 2.0), REQUIRED),
                        # The Sun's absolute magnitude in the band of [catalog] mag.
                        "sun_abs_mag": Key(_real(-10.0, 20.0), REQUIRED),
                        # Where the ratio comes from (a citation, or "assumed").
                        "source": Key(_text(), REQUIRED),
                    },
                    rule="must be a table {value = , sigma_dex = , sun_abs_mag = , source = }",
                ),
            ),
            # Stars in one galaxy of this log10 stellar mass [Msun] (reported when given).
            "galaxy_log10_mass": Key(_real(3.0, 14.0)),
            # How far along the past light cone the light-cone total reaches when `volume` is
            # "observable_universe" (a choice of this project: z = 8, where galaxy counts of
            # the literature stop; beyond it the fitted evolution is all there is).
            "light_cone_z_max": Key(_real(0.0, 30.0, lo_open=True), 8.0),
            # Monte Carlo draws per total (10^4 takes a few seconds).
            "draws": Key(_integer(1000, 1_000_000), 10_000),
            # The part of the sky totals are for (union of footprint items); absent: all of it.
            "target_sky": Key(_target_sky_items()),
        }
    ),
    "extinction": Section(
        {
            # A HEALPix map of E(B-V) (any nside, RING or NEST, full or partial sky).
            "map": Key(_path(), REQUIRED),
            # R = A_band / E(B-V): given, or looked up by band name.
            "coefficient": Key(_real(0.0, lo_open=True, unit="(A_band / E(B-V))")),
            "band": Key(_extinction_band()),
            "nest": Key(_boolean()),
        },
        check=_check_extinction,
    ),
    "sky_model": Section(
        {
            "mag_limit": Key(_real()),
            "covariate_sets": Key(_covariate_sets()),
            "maps": Key(_covariate_maps(), []),
            "likelihood": Key(_choice(["negative_binomial", "poisson"]), "negative_binomial"),
            "nside": Key(_power_of_two(1, 1024), 64),
            "draws": Key(_integer(100, 1_000_000), 4000),
        }
    ),
    "contamination": Section(
        {
            # A star catalogue of the same survey over the same footprint, subtracted from the
            # galaxy counts bin by bin.
            "star_catalog": Key(
                _list_of(
                    _path("must be a file path or glob pattern (a non-empty string)"),
                    min_len=1,
                    rule="must be a list of file paths or glob patterns (at least one)",
                ),
                REQUIRED,
            ),
            # Its columns, when they differ from [catalog]'s names.
            "columns": Key(_table({"ra": Key(_column), "dec": Key(_column),
                                   "mag": Key(_column)}), {}),
        }
    ),
    "cosmology": Section(
        {
            # Default "Planck18" is filled in by _check_cosmology when H0/Om0 are not given.
            "name": Key(_cosmology_name()),
            "H0": Key(_real(0.0, lo_open=True, unit="km/s/Mpc")),
            "Om0": Key(_real(0.0, 1.5)),
        },
        check=_check_cosmology,
    ),
    "output": Section(
        {
            "dir": Key(_path("must be a folder path (a non-empty string)"), "countscale_out"),
            "formats": Key(
                _subset(["json", "markdown", "html", "png"]), ["json", "markdown", "html", "png"]
            ),
        }
    ),
    "engine": Section(
        {
            "kind": Key(_choice(["local", "dask"]), "local"),
            "scheduler": Key(_text("must be a scheduler address (a non-empty string)")),
            "chunk_rows": Key(_integer(1), 2_000_000),
        },
        check=_check_engine,
    ),
}


# --------------------------------------------------------------------------------------------
# Rules across sections
# --------------------------------------------------------------------------------------------


def _check_redshifts_for_lf(
    sections: Mapping[str, Table], present: frozenset[str], where: _Where
) -> None:
    # 1/Vmax, STY and SWML all need a redshift per source.
    if {"luminosity_function", "catalog"} <= present and sections["catalog"].redshift is None:
        raise InputError(
            f"{where.in_section('luminosity_function').prefix} needs a redshift per source;"
            " got no [catalog] 'redshift' column"
        )


def _check_masses_for_mf(
    sections: Mapping[str, Table], present: frozenset[str], where: _Where
) -> None:
    if ({"luminosity_function", "catalog"} <= present
            and sections["luminosity_function"].quantity == "stellar_mass"
            and sections["catalog"].stellar_mass is None):
        raise InputError(
            f"{where.in_section('luminosity_function').prefix} quantity = \"stellar_mass\" "
            "needs a stellar mass per source; got no [catalog] 'stellar_mass' column"
        )


def _check_sky_model(
    sections: Mapping[str, Table], present: frozenset[str], where: _Where
) -> None:
    if "sky_model" not in present:
        return
    here = where.in_section("sky_model")
    section = sections["sky_model"]
    if section.mag_limit is None and sections["totals"].whole_sky_mag_limit is None:
        raise InputError(f"{here.prefix} needs a magnitude limit: give 'mag_limit', or "
                         "[totals] 'whole_sky_mag_limit'; got neither")
    from countscale.skymodel import BASIS

    known = [*BASIS, *(m.name for m in section.maps)]
    if "extinction" in present:
        known.append("ebv")
    for i, item in enumerate(section.maps):
        if item.name in BASIS or (item.name == "ebv" and "extinction" in present):
            raise here.key("maps").item(i).key("name").value_error(
                "must differ from the galactic basis' names and 'ebv' (the [extinction] map)",
                item.name)
    for i, names in enumerate(section.covariate_sets or ()):
        for j, name in enumerate(names):
            if name not in known:
                hint = (" ('ebv' needs an [extinction] section)" if name == "ebv" else "")
                raise here.key("covariate_sets").item(i).item(j).value_error(
                    "must be a covariate of the galactic basis or a map named in 'maps'"
                    + hint, name, _did_you_mean(name, known, _show) or
                    "; expected one of " + ", ".join(known))


def _check_contamination(
    sections: Mapping[str, Table], present: frozenset[str], where: _Where
) -> None:
    if "contamination" not in present or "catalog" not in present:
        return
    here = where.in_section("contamination")
    if sections["catalog"].population != "galaxies":
        raise InputError(f"{here.prefix} subtracts stars from galaxy counts; got [catalog] "
                         f"population = {_show(sections['catalog'].population)}")
    if sections["catalog"].classifier is not None:
        raise InputError(f"{here.prefix} and [catalog] 'classifier' both remove stars; give "
                         f"one of them; got classifier = {_show(sections['catalog'].classifier)}")


def _check_totals(
    sections: Mapping[str, Table], present: frozenset[str], where: _Where
) -> None:
    if "totals" not in present or "catalog" not in present:
        return
    here = where.in_section("totals")
    totals = sections["totals"]
    population = sections["catalog"].population
    if totals.volume is not None:
        if population != "galaxies":
            raise InputError(f"{here.key('volume')} totals over a volume apply to galaxies; got "
                             f"[catalog] population = {_show(population)}")
        if "luminosity_function" not in present:
            raise InputError(f"{here.key('volume')} needs a [luminosity_function] section (the "
                             "number density comes from its fit); got none")
        if totals.faint_limit is None:
            raise InputError(f"{here.key('volume')} needs 'faint_limit' (an absolute magnitude, "
                             "or a log10 stellar mass for a mass function); got none")
    if totals.stars and population == "galaxies":
        if totals.volume is None:
            raise InputError(f"{here.key('stars')} = true counts the stars in 'volume'; got no "
                             "'volume'")
        quantity = sections["luminosity_function"].quantity
        if quantity == "luminosity" and totals.mass_to_light is None:
            raise InputError(f"{here.key('stars')} = true with a luminosity function needs "
                             "'mass_to_light' (light is not mass); got none")


_FILE_CHECKS: tuple[Callable[[Mapping[str, Table], frozenset[str], _Where], None], ...] = (
    _check_redshifts_for_lf,
    _check_masses_for_mf,
    _check_sky_model,
    _check_contamination,
    _check_totals,
)


# --------------------------------------------------------------------------------------------
# The run file
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RunFile:
    """A validated run file.

    Attributes
    ----------
    path : pathlib.Path
        The run file, absolute.
    base_dir : pathlib.Path
        Its folder; relative paths in the file were resolved against it.
    label : str
        The file as the caller named it; messages start with it.
    present : frozenset of str
        The sections the file has.
    sections : Table
        Every section of :data:`SECTIONS` (validated, defaults filled), also reachable as
        attributes: ``runfile.catalog``, ``runfile.footprint``, ...
    """

    path: Path
    base_dir: Path
    label: str
    present: frozenset[str]
    sections: Table = field(repr=False)

    def __getattr__(self, name: str) -> Table:
        if not name.startswith("_"):
            sections = self.__dict__.get("sections")
            if sections is not None and name in sections:
                return sections[name]
        raise AttributeError(f"RunFile has no attribute or section {name!r}")

    def require(self, *names: str, needed_by: str | None = None) -> RunFile:
        """Check that the file has the given sections; return ``self``.

        Parameters
        ----------
        *names : str
            Section names, e.g. ``"catalog", "footprint"``.
        needed_by : str, optional
            What needs them (``"countscale run"``), for the message.

        Raises
        ------
        InputError
            ``survey.toml: missing required section [footprint] (needed by countscale run)``.
        """
        for name in names:
            if name not in SECTIONS:
                raise ValueError(
                    f"`names` must be run-file sections ({', '.join(SECTIONS)}); got {name!r}"
                )
        for name in names:
            if name not in self.present:
                reason = f" (needed by {needed_by})" if needed_by else ""
                raise InputError(f"{self.label}: missing required section [{name}]{reason}")
        return self

    def location(self, section: str, key: str | None = None) -> str:
        """The message prefix for a section or key: ``"survey.toml: [catalog] 'paths'"``.

        Other modules use it to name the key when a value that passed validation fails later
        (a file that does not exist, a column missing from the catalogue).
        """
        where = _Where(self.label, self.base_dir, section)
        return str(where.key(key) if key else where)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready copy of every section (for recording the run in results)."""
        return {
            "path": str(self.path),
            "present": sorted(self.present),
            "sections": self.sections.to_dict(),
        }


def _syntax_message(label: str, text: str, exc: tomllib.TOMLDecodeError) -> str:
    """Rewrite tomllib's message so it starts with the file and always gives a line."""
    message = str(exc)
    at = re.search(r"\s*\(at line (\d+), column (\d+)\)$", message)
    if at:
        return (
            f"{label}: TOML syntax error at line {at[1]}, column {at[2]}: {message[: at.start()]}"
        )
    end = re.search(r"\s*\(at end of document\)$", message)
    if end:
        n_lines = text.count("\n") + (0 if text.endswith("\n") else 1)
        return (
            f"{label}: TOML syntax error at line {max(n_lines, 1)} (end of file):"
            f" {message[: end.start()]}"
        )
    return f"{label}: TOML syntax error: {message}"


def parse_runfile(text: str, path: str | os.PathLike[str]) -> RunFile:
    """Validate run-file text as if it were read from ``path``.

    Parameters
    ----------
    text : str
        TOML text.
    path : str or path-like
        Where the text belongs: names the file in messages, and its folder is the base for
        relative paths. It need not exist.

    Returns
    -------
    RunFile

    Raises
    ------
    InputError, InputTypeError
        One-line message naming the file, the section/key, the rule and the value.
    """
    if not isinstance(path, str | os.PathLike):
        raise InputTypeError(f"`path` must be a str or path-like; got {type(path).__name__}")
    label = os.fspath(path)
    if not isinstance(text, str):
        raise InputTypeError(f"{label}: run-file text must be a str; got {type(text).__name__}")
    # A byte-order mark is not TOML, but some editors write one at the start of UTF-8 files.
    text = text.removeprefix("\ufeff")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(_syntax_message(label, text, exc)) from exc

    file_path = Path(os.path.abspath(Path(label).expanduser()))
    where = _Where(label, file_path.parent)

    for name, value in raw.items():
        if name in SECTIONS:
            if not isinstance(value, dict):
                raise where.in_section(name).type_error("must be a table (a section)", value)
        elif isinstance(value, dict):
            raise InputError(
                f"{label}: unknown section [{name}]" + _suggest(name, SECTIONS, _quote_section)
            )
        else:
            homes = [section for section, spec in SECTIONS.items() if name in spec.keys]
            hint = (
                f"; did you mean [{homes[0]}] '{name}'?"
                if homes
                else "; keys belong under a section header such as [survey]"
            )
            raise InputError(f"{label}: key '{name}' is outside any section{hint}")

    present = frozenset(raw)
    sections: dict[str, Table] = {}
    for name, spec in SECTIONS.items():
        here = where.in_section(name)
        table = _validate_keys(raw.get(name, {}), spec.keys, here, enforce_required=name in raw)
        sections[name] = spec.check(table, here) if spec.check is not None else table
    for file_check in _FILE_CHECKS:
        file_check(sections, present, where)

    return RunFile(
        path=file_path,
        base_dir=file_path.parent,
        label=label,
        present=present,
        sections=Table(sections),
    )


def load_runfile(path: str | os.PathLike[str]) -> RunFile:
    """Read and validate a run file.

    Parameters
    ----------
    path : str or path-like
        The TOML run file (UTF-8). Relative paths inside it are taken relative to its folder.

    Returns
    -------
    RunFile

    Raises
    ------
    InputError, InputTypeError
        The file is missing or unreadable, is not valid TOML (the message gives the line), or
        breaks the schema; one line naming the file, the section/key, the rule and the value.
    """
    if not isinstance(path, str | os.PathLike):
        raise InputTypeError(f"`path` must be a str or path-like; got {type(path).__name__}")
    label = os.fspath(path)
    file_path = Path(label).expanduser()
    if not file_path.exists():
        raise InputError(f"{label}: run file does not exist")
    if not file_path.is_file():
        raise InputError(f"{label}: run file must be a file; got a folder or special file")
    try:
        data = file_path.read_bytes()
    except OSError as exc:
        raise InputError(f"{label}: cannot read run file ({exc.strerror})") from exc
    try:
        # "utf-8-sig" drops the byte-order mark some editors put at the start of a UTF-8 file.
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(
            f"{label}: run file must be UTF-8 text; got byte 0x{data[exc.start]:02x}"
            f" at offset {exc.start}"
        ) from exc
    return parse_runfile(text, label)
