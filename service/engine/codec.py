"""Records ⇄ bipolar vectors: the schema of a collection and the codec built on it.

A record is a mapping of field name to value. Each field of the schema owns a contiguous block
of ``units`` entries of the pattern, in schema order, followed by an optional identity block.
Every block is made of deterministic item vectors (see :mod:`service.engine._items`):

* ``category`` — the item vector of the normalised value;
* ``text`` — the sign of the sum of the item vectors of the string's character n-grams, so that
  strings sharing most n-grams share most units;
* ``number`` and ``date`` — tile coding: values closer than the tolerance share most units, values
  further apart are unrelated;
* a missing value is the field's own null item, never zeros; zeros in a block mean "unknown"
  and appear only in cues.

Examples
--------
A coastal field station's specimen registry:

>>> schema = Schema.from_dict({"fields": [
...     {"name": "site", "kind": "category"},
...     {"name": "species", "kind": "text"},
...     {"name": "depth_m", "kind": "number", "tolerance": 5.0, "minimum": 0, "maximum": 500},
...     {"name": "collected_on", "kind": "date"},
... ]})
>>> codec = Codec(schema, seed=11)
>>> pattern = codec.encode_record({"site": "North Jetty", "species": "Patella vulgata",
...                                "depth_m": 12.5, "collected_on": "2023-06-14"})
>>> pattern.shape, pattern.dtype.name
((1152,), 'int8')
>>> cue = codec.encode_cue({"species": "Patela vulgata"})
>>> overlaps = codec.field_overlaps(pattern, cue)
>>> list(overlaps), overlaps["species"] > 0.6
(['species'], True)
"""

from __future__ import annotations

import dataclasses
import datetime
import functools
import math
import numbers
import re
import unicodedata
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Final

import numpy as np
import numpy.typing as npt

from service.engine._items import CODEC_VERSION, item_vector, sum_of_items
from service.engine.errors import (
    ParameterError,
    RecordError,
    SchemaError,
    ShapeError,
    StateValueError,
)

__all__ = [
    "CODEC_VERSION",
    "IDENTITY_BLOCK",
    "KINDS",
    "MAX_FIELDS",
    "MAX_UNITS",
    "Codec",
    "FieldMatch",
    "FieldSpec",
    "Schema",
]

KINDS: Final = ("category", "text", "number", "date")
MAX_FIELDS: Final = 64
MAX_UNITS: Final = 16384
MAX_STRING_LENGTH: Final = 65536
MAX_GRID: Final = 100_000
IDENTITY_BLOCK: Final = "_identity"
"""Key of the identity block in :attr:`Schema.slices`; field names cannot start with ``_``."""

_DEFAULT_UNITS: Final = {"category": 128, "text": 512, "number": 256, "date": 256}
_NAME_RE: Final = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,63}")
_ISO_DATE_RE: Final = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")
_OPTIONS: Final[dict[str, tuple[str, ...]]] = {
    "category": ("max_length",),
    "text": ("ngram", "bigrams", "max_length"),
    "number": ("tolerance", "minimum", "maximum", "clamp", "tilings"),
    "date": ("tolerance_days", "minimum", "maximum", "clamp", "tilings"),
}
_COMMON: Final = ("name", "kind", "units", "nullable")
# A padding marker must never occur in normalised text; control characters are mapped to spaces
# during normalisation, so STX is free.
_PAD: Final = "\x02"
_CONTROL_TO_SPACE: Final = dict.fromkeys([*range(0x20), *range(0x7F, 0xA0)], " ")
# NFKC can lengthen a string (one ligature may become many letters), so the cheap guard on the
# raw length is looser than the limit checked after normalisation.
_RAW_LENGTH_FACTOR: Final = 8

Int8Array = npt.NDArray[np.int8]
Value = str | float | datetime.date


def _describe(value: object) -> str:
    return type(value).__name__


def _is_real(value: object) -> bool:
    # bool is an int subclass, but True as a depth is almost always a bug upstream.
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


@dataclass(frozen=True)
class FieldSpec:
    """One field of a schema.

    Options that do not belong to the field's kind must stay at their defaults; after
    construction every option of the kind holds a concrete value (defaults filled in).

    Parameters
    ----------
    name : str
        1–64 letters, digits or underscores, starting with a letter.
    kind : {"category", "text", "number", "date"}
    units : int, optional
        Length of the field's block: a positive multiple of 8, at most ``MAX_UNITS``.
        Defaults: category 128, text 512, number 256, date 256.
    nullable : bool, default True
        Whether a record may leave the field missing (encoded as the field's null item).
    ngram : int, default 3
        text: longest n-gram, 2–5.
    bigrams : bool, default True
        text: also use the (ngram − 1)-grams of every string.
    max_length : int, default 256
        category, text: longest accepted value, in characters after normalisation.
    tolerance : float
        number (required): tile width; values this far apart share no tiles.
    tolerance_days : float, default 30
        date: tile width in days.
    minimum, maximum : float or datetime.date, optional
        number, date: accepted range; values outside it are rejected, or clamped if ``clamp``.
    clamp : bool, default False
        number, date: clamp out-of-range values instead of rejecting them.
    tilings : int, default 8
        number, date: count of offset tilings; must divide ``units`` into blocks of ≥ 8 units.

    Raises
    ------
    SchemaError
        If any value is outside its allowed range; ``field`` names the field.

    Examples
    --------
    >>> FieldSpec("depth_m", "number", tolerance=5).units
    256
    >>> FieldSpec("depth_m", "number", tolerance=-3.0)
    Traceback (most recent call last):
    ...
    service.engine.errors.SchemaError: field 'depth_m': tolerance must be > 0, got -3.0
    """

    name: str
    kind: str
    units: int | None = None
    nullable: bool = True
    ngram: int = 3
    bigrams: bool = True
    max_length: int = 256
    tolerance: float | None = None
    tolerance_days: float = 30.0
    minimum: float | datetime.date | None = None
    maximum: float | datetime.date | None = None
    clamp: bool = False
    tilings: int = 8

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not _NAME_RE.fullmatch(self.name):
            raise SchemaError(
                f"field name must be 1-64 letters, digits or underscores starting with a letter,"
                f" got {self.name!r}",
                field=self.name if isinstance(self.name, str) else None,
            )
        if self.kind not in KINDS:
            raise self._error(f"kind must be one of {', '.join(KINDS)}, got {self.kind!r}")
        for option in (f.name for f in dataclasses.fields(self)):
            if option in _COMMON or option in _OPTIONS[self.kind]:
                continue
            if getattr(self, option) != _DEFAULTS[option]:
                raise self._error(f"option {option!r} does not apply to kind {self.kind!r}")
        units = _DEFAULT_UNITS[self.kind] if self.units is None else self.units
        self._check_int("units", units, 8, MAX_UNITS)
        if units % 8:
            raise self._error(f"units must be a positive multiple of 8, got {units}")
        object.__setattr__(self, "units", units)
        self._check_bool("nullable")
        if self.kind == "text":
            self._check_int("ngram", self.ngram, 2, 5)
            self._check_bool("bigrams")
        if self.kind in ("category", "text"):
            self._check_int("max_length", self.max_length, 1, MAX_STRING_LENGTH)
        if self.kind in ("number", "date"):
            self._post_init_tiles(units)

    def _post_init_tiles(self, units: int) -> None:
        self._check_bool("clamp")
        self._check_int("tilings", self.tilings, 1, units)
        if units % self.tilings or units // self.tilings < 8:
            raise self._error(
                f"tilings must divide units into blocks of at least 8 units,"
                f" got {self.tilings} tilings of {units} units"
            )
        width_name = "tolerance" if self.kind == "number" else "tolerance_days"
        width = getattr(self, width_name)
        if width is None:
            raise self._error(f"{width_name} is required for kind {self.kind!r}")
        if not _is_real(width) or not math.isfinite(width):
            raise self._error(f"{width_name} must be a finite number, got {width!r}")
        if width <= 0:
            raise self._error(f"{width_name} must be > 0, got {float(width)!r}")
        object.__setattr__(self, width_name, float(width))
        for bound in ("minimum", "maximum"):
            value = getattr(self, bound)
            if value is None:
                continue
            if self.kind == "number":
                if not _is_real(value) or not math.isfinite(value):
                    raise self._error(f"{bound} must be a finite number, got {value!r}")
                object.__setattr__(self, bound, float(value))
            elif type(value) is not datetime.date:
                raise self._error(f"{bound} must be a date, got {_describe(value)}")
        if self.minimum is not None and self.maximum is not None:
            # Both bounds are floats, or both dates, by now; mypy cannot see that.
            if not self.minimum < self.maximum:  # type: ignore[operator]
                raise self._error(
                    f"minimum must be below maximum, got {self.minimum} and {self.maximum}"
                )

    def _error(self, message: str) -> SchemaError:
        return SchemaError(f"field {self.name!r}: {message}", field=self.name)

    def _check_int(self, option: str, value: object, low: int, high: int) -> None:
        if not isinstance(value, int) or isinstance(value, bool):
            raise self._error(f"{option} must be an integer, got {_describe(value)}")
        if not low <= value <= high:
            raise self._error(f"{option} must be between {low} and {high}, got {value}")

    def _check_bool(self, option: str) -> None:
        value = getattr(self, option)
        if not isinstance(value, bool):
            raise self._error(f"{option} must be true or false, got {_describe(value)}")

    @property
    def n_units(self) -> int:
        """Length of the field's block (``units`` with the kind's default filled in)."""
        return _DEFAULT_UNITS[self.kind] if self.units is None else self.units

    @classmethod
    def from_dict(cls, obj: Mapping[str, object]) -> FieldSpec:
        """Build a field from a JSON-like dict; dates may be ISO ``YYYY-MM-DD`` strings.

        Examples
        --------
        >>> try:
        ...     FieldSpec.from_dict({"name": "site", "kind": "category", "tolerence": 1})
        ... except SchemaError as exc:
        ...     print(exc)
        field 'site': unknown option 'tolerence' for kind 'category'
        """
        if not isinstance(obj, Mapping):
            raise SchemaError(f"a field must be an object, got {_describe(obj)}")
        name = obj.get("name")
        label = name if isinstance(name, str) else None
        if "name" not in obj or "kind" not in obj:
            missing = "name" if "name" not in obj else "kind"
            raise SchemaError(f"field {name!r}: {missing!r} is required", field=label)
        kind = obj["kind"]
        if kind not in KINDS:
            raise SchemaError(
                f"field {name!r}: kind must be one of {', '.join(KINDS)}, got {kind!r}",
                field=label,
            )
        kwargs: dict[str, Any] = {}
        for key, value in obj.items():
            if key not in _COMMON and key not in _OPTIONS[str(kind)]:
                raise SchemaError(
                    f"field {name!r}: unknown option {key!r} for kind {kind!r}", field=label
                )
            if kind == "date" and key in ("minimum", "maximum") and isinstance(value, str):
                value = _parse_iso_date(value)
                if value is None:
                    raise SchemaError(
                        f"field {name!r}: {key} must be an ISO date (YYYY-MM-DD), got {obj[key]!r}",
                        field=label,
                    )
            kwargs[key] = value
        return cls(**kwargs)

    def to_dict(self) -> dict[str, object]:
        """Canonical JSON-like dict of the field, every option of its kind filled in.

        Examples
        --------
        >>> FieldSpec("site", "category").to_dict()
        {'name': 'site', 'kind': 'category', 'units': 128, 'nullable': True, 'max_length': 256}
        """
        out: dict[str, object] = {
            "name": self.name,
            "kind": self.kind,
            "units": self.n_units,
            "nullable": self.nullable,
        }
        for option in _OPTIONS[self.kind]:
            value = getattr(self, option)
            out[option] = value.isoformat() if isinstance(value, datetime.date) else value
        return out


_DEFAULTS: Final[dict[str, object]] = {
    f.name: f.default for f in dataclasses.fields(FieldSpec) if f.name not in ("name", "kind")
}


def _parse_iso_date(text: str) -> datetime.date | None:
    # date.fromisoformat also takes week dates and compact forms; records only use YYYY-MM-DD.
    text = text.strip()
    if not _ISO_DATE_RE.fullmatch(text):
        return None
    try:
        return datetime.date.fromisoformat(text)
    except ValueError:
        return None


@dataclass(frozen=True)
class Schema:
    """Ordered fields of a collection, plus an optional identity block.

    Parameters
    ----------
    fields : tuple of FieldSpec
        1 to ``MAX_FIELDS`` fields with unique names; blocks follow this order.
    identity_units : int, default 0
        Length of a block filled, in stored patterns, with an item vector seeded by the memory's
        key. It lowers the correlation between records that share most field values; cues leave
        it unknown (0). A multiple of 8, at most ``MAX_UNITS``.

    Examples
    --------
    >>> schema = Schema((FieldSpec("site", "category"), FieldSpec("notes", "text")), 64)
    >>> schema.n_units
    704
    >>> schema.slices["notes"], schema.slices["_identity"]
    (slice(128, 640, None), slice(640, 704, None))
    """

    fields: tuple[FieldSpec, ...]
    identity_units: int = 0

    def __post_init__(self) -> None:
        if isinstance(self.fields, (str, bytes)) or not isinstance(self.fields, Sequence):
            raise SchemaError(f"fields must be a list of fields, got {_describe(self.fields)}")
        object.__setattr__(self, "fields", tuple(self.fields))
        if not 1 <= len(self.fields) <= MAX_FIELDS:
            raise SchemaError(
                f"a schema needs between 1 and {MAX_FIELDS} fields, got {len(self.fields)}"
            )
        seen: set[str] = set()
        for spec in self.fields:
            if not isinstance(spec, FieldSpec):
                raise SchemaError(f"fields must hold FieldSpec objects, got {_describe(spec)}")
            if spec.name in seen:
                raise SchemaError(f"field {spec.name!r} appears more than once", field=spec.name)
            seen.add(spec.name)
        units = self.identity_units
        if not isinstance(units, int) or isinstance(units, bool):
            raise SchemaError(f"identity_units must be an integer, got {_describe(units)}")
        if not 0 <= units <= MAX_UNITS or units % 8:
            raise SchemaError(
                f"identity_units must be a multiple of 8 between 0 and {MAX_UNITS}, got {units}"
            )

    @property
    def n_units(self) -> int:
        """Pattern length: the fields' units plus the identity block."""
        return sum(spec.n_units for spec in self.fields) + self.identity_units

    @property
    def slices(self) -> dict[str, slice]:
        """Block of each field in field order, then ``IDENTITY_BLOCK`` if it has units."""
        out: dict[str, slice] = {}
        start = 0
        for spec in self.fields:
            out[spec.name] = slice(start, start + spec.n_units)
            start += spec.n_units
        if self.identity_units:
            out[IDENTITY_BLOCK] = slice(start, start + self.identity_units)
        return out

    def field(self, name: str) -> FieldSpec:
        """The field called ``name``; SchemaError if there is none."""
        for spec in self.fields:
            if spec.name == name:
                return spec
        raise SchemaError(f"the schema has no field {name!r}", field=name)

    @classmethod
    def from_dict(cls, obj: Mapping[str, object]) -> Schema:
        """Build a schema from ``{"fields": [...], "identity_units": 0}``.

        Examples
        --------
        >>> Schema.from_dict({"fields": [{"name": "site", "kind": "category"}]}).n_units
        128
        """
        if not isinstance(obj, Mapping):
            raise SchemaError(f"a schema must be an object, got {_describe(obj)}")
        for key in obj:
            if key not in ("fields", "identity_units"):
                raise SchemaError(f"unknown schema option {key!r}")
        raw_fields = obj.get("fields")
        if isinstance(raw_fields, (str, bytes)) or not isinstance(raw_fields, Sequence):
            raise SchemaError(f"'fields' must be a list, got {_describe(raw_fields)}")
        if len(raw_fields) > MAX_FIELDS:
            raise SchemaError(
                f"a schema needs between 1 and {MAX_FIELDS} fields, got {len(raw_fields)}"
            )
        specs = tuple(FieldSpec.from_dict(item) for item in raw_fields)
        identity = obj.get("identity_units", 0)
        return cls(specs, identity)  # type: ignore[arg-type]  # checked in __post_init__

    def to_dict(self) -> dict[str, object]:
        """Canonical dict, defaults filled in; ``Schema.from_dict(s.to_dict()) == s``."""
        return {
            "fields": [spec.to_dict() for spec in self.fields],
            "identity_units": self.identity_units,
        }


@dataclass(frozen=True)
class FieldMatch:
    """How well one candidate value fits a field's block of a state.

    Attributes
    ----------
    value : object
        The candidate, as the caller gave it.
    overlap : float
        Mean of the products of the block and the candidate's code; in [-1, 1] for a ±1 state.
    z : float
        ``sqrt(units) * overlap``: about standard normal for a candidate unrelated to the state.
    """

    value: object
    overlap: float
    z: float


class Codec:
    """Encode records and cues of one schema as bipolar patterns, and decode fields back.

    Parameters
    ----------
    schema : Schema
    seed : int
        Collection seed; every item vector depends on it, so two collections with different
        seeds give nearly orthogonal patterns for the same record.

    Notes
    -----
    Value rules:

    * category: ``str`` or ``int`` (an int is the same category as its decimal string); ``bool``
      and ``float`` are rejected because ``True``/``1.0`` rarely mean a category on purpose.
    * category and text: NFKC, casefold, control characters to spaces, whitespace collapsed and
      stripped. A string empty after that is a missing value, like ``None`` (spreadsheet exports
      write missing cells as empty strings).
    * number: ``int`` or ``float`` (or NumPy scalars), finite, not ``bool``; strings are rejected,
      parsing belongs to the import layer.
    * date: ``datetime.date`` or an ISO ``YYYY-MM-DD`` string (empty string = missing);
      ``datetime.datetime`` is rejected so that no time of day is silently dropped.

    Examples
    --------
    >>> schema = Schema((FieldSpec("site", "category"), FieldSpec("depth_m", "number",
    ...                  tolerance=5.0, maximum=500.0)))
    >>> codec = Codec(schema, seed=3)
    >>> stored = codec.encode_record({"site": "Kelp Bed 2", "depth_m": 40})
    >>> [m.value for m in codec.decode_field(stored, "depth_m", [20, 38, 40, 60])][:2]
    [40, 38]
    >>> codec.encode_record({"site": "Kelp Bed 2", "depth_m": 812.0})
    Traceback (most recent call last):
    ...
    service.engine.errors.RecordError: field 'depth_m' is 812.0, above the schema's maximum 500.0
    """

    def __init__(self, schema: Schema, seed: int) -> None:
        if not isinstance(schema, Schema):
            raise ParameterError(f"schema must be a Schema, got {_describe(schema)}")
        if not isinstance(seed, int) or isinstance(seed, bool):
            raise ParameterError(f"seed must be an integer, got {_describe(seed)}")
        self.schema = schema
        self.seed = seed
        self.n_units = schema.n_units
        self._slices = schema.slices
        self._specs = {spec.name: spec for spec in schema.fields}

    # -- values ---------------------------------------------------------------------------------

    def normalise(self, field_name: str, value: object) -> Value | None:
        """Canonical form of ``value`` for the field; ``None`` for a missing value.

        Returns a ``str`` for category and text, a ``float`` for number (clamped if the schema
        says so), a ``datetime.date`` for date.

        Raises
        ------
        RecordError
            If the field is unknown or the value does not fit it.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("site", "category"),)), seed=0)
        >>> codec.normalise("site", "  North\\tJETTY ")
        'north jetty'
        """
        return _normalise(self._spec(field_name), value)

    def _spec(self, field_name: object) -> FieldSpec:
        spec = self._specs.get(field_name) if isinstance(field_name, str) else None
        if spec is None:
            raise RecordError(
                f"unknown field {field_name!r}; the schema's fields are {', '.join(self._specs)}",
                field=str(field_name),
            )
        return spec

    def _field_code(self, spec: FieldSpec, value: object) -> Int8Array:
        canonical = _normalise(spec, value)
        if canonical is None:
            if not spec.nullable:
                raise RecordError(
                    f"field {spec.name!r} is missing, and the schema marks it not nullable",
                    field=spec.name,
                )
            return item_vector(self.seed, spec.name, "null", "", spec.n_units)
        return _value_code(self.seed, spec, canonical)

    # -- encoding -------------------------------------------------------------------------------

    def encode_value(self, field_name: str, value: object) -> Int8Array:
        """Code of one field value: the field's block as a stored record would hold it.

        ``None`` gives the field's null item.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("site", "category", units=16),)), seed=0)
        >>> bool((codec.encode_value("site", "SMP-N3") ==
        ...       codec.encode_record({"site": "SMP-N3"})).all())
        True
        """
        return self._field_code(self._spec(field_name), value)

    def encode_record(self, record: Mapping[str, object], key: str | None = None) -> Int8Array:
        """Pattern of one stored record.

        Parameters
        ----------
        record : mapping of str to value
            Missing fields and ``None`` values are encoded as the field's null item.
        key : str, optional
            The memory's key; required when the schema has an identity block, ignored otherwise.

        Returns
        -------
        numpy.ndarray of int8, shape (n_units,)
            Values in {-1, +1} only.
        """
        if not isinstance(record, Mapping):
            raise RecordError(
                f"a record must be a mapping of field to value, got {_describe(record)}"
            )
        for name in record:
            self._spec(name)
        out = np.empty(self.n_units, dtype=np.int8)
        for spec in self.schema.fields:
            out[self._slices[spec.name]] = self._field_code(spec, record.get(spec.name))
        if self.schema.identity_units:
            if not isinstance(key, str) or not key:
                raise RecordError(
                    "the schema has an identity block, so a record needs a non-empty key",
                    field=IDENTITY_BLOCK,
                )
            identity = item_vector(self.seed, "", "identity", key, self.schema.identity_units)
            out[self._slices[IDENTITY_BLOCK]] = identity
        return out

    def encode_records(
        self, records: Sequence[Mapping[str, object]], keys: Sequence[str] | None = None
    ) -> Int8Array:
        """Patterns of many records, shape (n_records, n_units); errors say which record.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("site", "category"),)), seed=0)
        >>> codec.encode_records([{"site": "dunes"}, {"site": None}]).shape
        (2, 128)
        """
        if keys is not None and len(keys) != len(records):
            raise ParameterError(f"got {len(records)} records but {len(keys)} keys")
        out = np.empty((len(records), self.n_units), dtype=np.int8)
        for i, record in enumerate(records):
            try:
                out[i] = self.encode_record(record, None if keys is None else keys[i])
            except RecordError as exc:
                raise RecordError(f"record {i}: {exc}", field=exc.field) from exc
        return out

    def encode_cue(self, cue: Mapping[str, object]) -> Int8Array:
        """Pattern of a cue: known fields encoded, everything else 0.

        A field absent from the cue is unknown (its block is 0); a field present with ``None``
        is known to be missing and gets the null item. The identity block is always 0.

        Returns
        -------
        numpy.ndarray of int8, shape (n_units,)
            Values in {-1, 0, +1}.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("site", "category"), FieldSpec("notes", "text"))), 0)
        >>> cue = codec.encode_cue({"site": "dunes"})
        >>> int(codec.known_mask(cue).sum()), bool((cue[128:] == 0).all())
        (128, True)
        """
        if not isinstance(cue, Mapping):
            raise RecordError(f"a cue must be a mapping of field to value, got {_describe(cue)}")
        if not cue:
            raise RecordError("a cue needs at least one known field")
        out = np.zeros(self.n_units, dtype=np.int8)
        for name, value in cue.items():
            spec = self._spec(name)
            out[self._slices[spec.name]] = self._field_code(spec, value)
        return out

    def encode_cues(self, cues: Sequence[Mapping[str, object]]) -> Int8Array:
        """Patterns of many cues, shape (n_cues, n_units); errors say which cue."""
        out = np.zeros((len(cues), self.n_units), dtype=np.int8)
        for i, cue in enumerate(cues):
            try:
                out[i] = self.encode_cue(cue)
            except RecordError as exc:
                raise RecordError(f"cue {i}: {exc}", field=exc.field) from exc
        return out

    @staticmethod
    def known_mask(cue: npt.ArrayLike) -> npt.NDArray[np.bool_]:
        """True where a cue is known (non-zero)."""
        mask: npt.NDArray[np.bool_] = np.asarray(cue) != 0
        return mask

    # -- decoding -------------------------------------------------------------------------------

    def _state(self, state: npt.ArrayLike, name: str = "state") -> npt.NDArray[np.float64]:
        array = np.asarray(state)
        if array.ndim != 1 or array.shape[0] != self.n_units:
            raise ShapeError(f"{name} must have shape ({self.n_units},), got {array.shape}")
        if not (np.issubdtype(array.dtype, np.number) or array.dtype == np.bool_):
            raise StateValueError(f"{name} must be numeric, got dtype {array.dtype}")
        values = array.astype(np.float64)
        if not np.isfinite(values).all():
            raise StateValueError(f"{name} holds NaN or infinite values")
        return values

    def decode_field(
        self, state: npt.ArrayLike, field_name: str, candidates: Iterable[object]
    ) -> list[FieldMatch]:
        """Rank candidate values of a field by their overlap with the field's block of a state.

        Parameters
        ----------
        state : array of shape (n_units,)
            A settled state or a stored pattern.
        field_name : str
        candidates : iterable
            Values of the field; ``None`` stands for the null item.

        Returns
        -------
        list of FieldMatch
            Best first; equal overlaps keep the candidates' order.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("species", "text"),)), seed=5)
        >>> state = codec.encode_record({"species": "Littorina littorea"})
        >>> best = codec.decode_field(state, "species", ["Littorina obtusata",
        ...                                              "Littorina littorea", None])[0]
        >>> best.value, best.overlap
        ('Littorina littorea', 1.0)
        """
        spec = self._spec(field_name)
        block = self._state(state)[self._slices[spec.name]]
        values = list(candidates)
        if not values:
            return []
        codes = np.stack([self._field_code(spec, value) for value in values])
        overlaps = (codes.astype(np.float64) @ block) / spec.n_units
        order = np.argsort(-overlaps, kind="stable")
        scale = math.sqrt(spec.n_units)
        return [
            FieldMatch(values[i], float(overlaps[i]), float(scale * overlaps[i])) for i in order
        ]

    def value_grid(self, field_name: str, lo: object, hi: object, n: int) -> list[Value]:
        """``n`` evenly spaced candidate values from ``lo`` to ``hi`` of a number or date field.

        Date grids are rounded to whole days, so they hold fewer than ``n`` values when the span
        is shorter than ``n`` days.

        Examples
        --------
        >>> codec = Codec(Schema((FieldSpec("depth_m", "number", tolerance=5.0),)), seed=0)
        >>> codec.value_grid("depth_m", 0, 20, 5)
        [0.0, 5.0, 10.0, 15.0, 20.0]
        """
        spec = self._spec(field_name)
        if spec.kind not in ("number", "date"):
            raise ParameterError(
                f"value_grid needs a number or date field; {spec.name!r} is a {spec.kind} field"
            )
        if not isinstance(n, int) or isinstance(n, bool) or not 1 <= n <= MAX_GRID:
            raise ParameterError(f"n must be an integer between 1 and {MAX_GRID}, got {n!r}")
        low, high = _normalise(spec, lo), _normalise(spec, hi)
        if low is None or high is None:
            raise ParameterError("value_grid needs both ends of the grid")
        low_x, high_x = _position(low), _position(high)
        if low_x > high_x:
            raise ParameterError(f"lo must not be above hi, got {low} and {high}")
        points = np.linspace(low_x, high_x, n)
        if spec.kind == "number":
            return [float(x) for x in points]
        days = dict.fromkeys(round(float(x)) for x in points)
        return [datetime.date.fromordinal(day) for day in days]

    def field_overlaps(self, state: npt.ArrayLike, other: npt.ArrayLike) -> dict[str, float]:
        """Overlap of ``state`` and ``other`` over each field's block.

        Fields where ``other`` is all 0 (unknown in a cue) are left out, and so is the identity
        block.
        """
        a = self._state(state)
        b = self._state(other, "pattern_or_cue")
        out: dict[str, float] = {}
        for spec in self.schema.fields:
            block = self._slices[spec.name]
            if not b[block].any():
                continue
            out[spec.name] = float(a[block] @ b[block]) / spec.n_units
        return out


# -- per-kind encoders (module level so that their caches are shared and bounded) ---------------


def _normalise(spec: FieldSpec, value: object) -> Value | None:
    if value is None:
        return None
    if spec.kind in ("category", "text"):
        return _normalise_string(spec, value)
    if spec.kind == "number":
        return _normalise_number(spec, value)
    return _normalise_date(spec, value)


def _record_error(spec: FieldSpec, message: str) -> RecordError:
    return RecordError(f"field {spec.name!r} {message}", field=spec.name)


def _normalise_string(spec: FieldSpec, value: object) -> str | None:
    if spec.kind == "category" and _is_real(value) and isinstance(value, numbers.Integral):
        value = str(int(value))
    if not isinstance(value, str):
        accepted = "a string or an integer" if spec.kind == "category" else "a string"
        raise _record_error(spec, f"must be {accepted}, got {_describe(value)}")
    limit = spec.max_length
    if len(value) > _RAW_LENGTH_FACTOR * limit:
        raise _record_error(
            spec, f"is {len(value)} characters long, over the schema's max_length {limit}"
        )
    text = _canonical_string(value)
    if len(text) > limit:
        raise _record_error(
            spec,
            f"is {len(text)} characters long after normalisation,"
            f" over the schema's max_length {limit}",
        )
    return text or None


def _canonical_string(value: str) -> str:
    # Casefolding can leave a string that NFKC would change again (e.g. some Greek and
    # ligature forms), so normalise on both sides of it.
    text = unicodedata.normalize("NFKC", value).translate(_CONTROL_TO_SPACE)
    text = unicodedata.normalize("NFKC", text.casefold())
    return " ".join(text.split())


def _check_range(spec: FieldSpec, value: Any, shown: str) -> Any:
    if spec.minimum is not None and value < spec.minimum:
        if not spec.clamp:
            raise _record_error(spec, f"is {shown}, below the schema's minimum {spec.minimum}")
        return spec.minimum
    if spec.maximum is not None and value > spec.maximum:
        if not spec.clamp:
            raise _record_error(spec, f"is {shown}, above the schema's maximum {spec.maximum}")
        return spec.maximum
    return value


def _normalise_number(spec: FieldSpec, value: object) -> float:
    if not _is_real(value):
        raise _record_error(spec, f"must be a number, got {_describe(value)}")
    number = float(value)  # type: ignore[arg-type]  # a numbers.Real
    if not math.isfinite(number):
        raise _record_error(spec, f"must be a finite number, got {number}")
    result: float = _check_range(spec, number, repr(number))
    return result


def _normalise_date(spec: FieldSpec, value: object) -> datetime.date | None:
    if isinstance(value, str):
        if not value.strip():
            return None
        parsed = _parse_iso_date(value)
        if parsed is None:
            raise _record_error(spec, f"is not an ISO date (YYYY-MM-DD): {value[:40]!r}")
        value = parsed
    if type(value) is not datetime.date:
        raise _record_error(spec, f"must be a date or a YYYY-MM-DD string, got {_describe(value)}")
    result: datetime.date = _check_range(spec, value, value.isoformat())
    return result


def _position(value: Value) -> float:
    """Coordinate of a number or date on the line that the tiles cover (days for dates)."""
    if isinstance(value, datetime.date):
        return float(value.toordinal())
    return float(value)


@functools.lru_cache(maxsize=1 << 14)
def _value_code(seed: int, spec: FieldSpec, value: Value) -> Int8Array:
    if spec.kind == "category":
        return item_vector(seed, spec.name, "value", str(value), spec.n_units)
    if spec.kind == "text":
        return _text_code(seed, spec, str(value))
    return _tile_code(seed, spec, _position(value))


def _ngrams(text: str, n: int, bigrams: bool) -> list[str]:
    """Character n-grams (and (n−1)-grams), each size s padded with s − 1 markers per side.

    Full padding puts every character into exactly n grams of each size, so a typo in the first
    letter costs as much as one in the middle. With both sizes the gram count 2·len + 2n − 3 is
    odd, so the sum of ±1 item vectors is never 0 and no tie needs breaking.
    """
    grams: list[str] = []
    for size in (n, n - 1) if bigrams else (n,):
        padded = _PAD * (size - 1) + text + _PAD * (size - 1)
        grams.extend(padded[i : i + size] for i in range(len(padded) - size + 1))
    return grams


def _text_code(seed: int, spec: FieldSpec, text: str) -> Int8Array:
    units = spec.n_units
    total = sum_of_items(seed, spec.name, "gram", _ngrams(text, spec.ngram, spec.bigrams), units)
    code = np.sign(total).astype(np.int8)
    ties = total == 0
    if ties.any():
        # Seeded by the value itself: a tie vector shared by all values would add the same
        # component to every record and correlate them.
        code[ties] = item_vector(seed, spec.name, "tie", text, units)[ties]
    code.flags.writeable = False
    return code


def _tile_code(seed: int, spec: FieldSpec, x: float) -> Int8Array:
    width = spec.tolerance if spec.kind == "number" else spec.tolerance_days
    if width is None:  # unreachable: FieldSpec.__post_init__ requires it for number fields
        raise SchemaError(f"field {spec.name!r}: tolerance is required", field=spec.name)
    n_tilings = spec.tilings
    block = spec.n_units // n_tilings
    scaled = x / width
    # Tiling t is shifted by t/T of a tile: two values δ apart fall in different tiles in about
    # T·δ/width tilings, so the expected overlap is max(0, 1 − δ/width) wherever they lie.
    blocks = [
        item_vector(seed, spec.name, "tile", f"{t}:{math.floor(scaled + t / n_tilings)}", block)
        for t in range(n_tilings)
    ]
    code = np.concatenate(blocks)
    code.flags.writeable = False
    return code
