"""HDF5 output store of a study: one self-describing group per case, appended while integrating.

The layout is the schema ``longarc-study-trajectories``, version :data:`SCHEMA_VERSION`,
documented group by group in ``docs/hdf5_schema.md`` (keep the two in step; a change of
layout bumps the version and adds a line to that file's history).

Design (measured pitfalls in ``DESIGN.md``):

* A short case (time series of at most :data:`SMALL_CASE_BYTES` in all, e.g. 1 day at
  5-minute output) is held in memory while it is appended and each series is written
  whole when the case ends (or is stopped, or the file closes): contiguous, unfiltered,
  fixed extent.  At that size compression gains nothing (ratio ~1.1 for states at 289
  rows, less than the chunk index costs) and the chunked, compressed path cost ~0.15 ms
  more per series.
* Longer cases are streamed: every time-indexed dataset is chunked along time,
  resizable (``maxshape`` None on the time axis) and compressed with the shuffle filter
  followed by LZF (default) or gzip.  Float state data barely compress without shuffle.
  A case that announces its number of samples (``begin_case(expected_rows=...)``, the
  runner does) gets chunks of at most that many rows: compressing a 4096-row chunk that
  holds 289 rows cost ~0.3 ms per dataset of a 1-day case.
* Per-case bookkeeping is cheap: case groups and time series are copied whole from
  per-process in-memory templates (:class:`_Templates`, one ``H5Ocopy`` instead of ~20
  attribute writes; a short case's series are written into their template and copied
  with their data), attributes are written through low-level calls
  (:func:`_set_attrs`); a template group's plain values (str, int, float, bool) are
  compared as Python values and only those that differ are converted and written.
* The metadata cache of a file opened for writing has a fixed size
  (:data:`METADATA_CACHE_BYTES`, 256 KiB): every flush scans all its entries, and with
  HDF5's default (2 MiB, growing) the flushes of a run got slower as its cases filled
  the cache.
* A case is appended block by block (:meth:`CaseWriter.append`), so a year-long arc at
  10 s spacing never has to be in memory whole.  The chunk cache is sized so that the
  partially filled chunk of every dataset of a case stays in memory between appends.
* Case status (attribute ``status``): ``"running"`` while written, then ``"complete"``,
  ``"failed"`` (:meth:`StudyStore.mark_failed`: an error) or ``"interrupted"``
  (:meth:`StudyStore.mark_interrupted`: stopped on request, samples so far kept;
  :func:`mark_unfinished_as_interrupted`: a writer that ended mid-case).  Only
  ``"complete"`` counts as done (:meth:`StudyStore.completed_cases`).
* Crash robustness: the file is flushed after a case group is created (status
  ``"running"``), when a case is finished (so a completed case is durable at once),
  after a case is marked failed or interrupted or imported, on close, and at most every
  ``flush_interval_s`` seconds while appending.  A process killed mid-case leaves the completed cases intact and the
  unfinished case with status ``"running"``; reopening the file with ``mode="a"`` and
  calling :meth:`StudyStore.begin_case` for that name (or
  :func:`mark_unfinished_as_interrupted`) cleans it up.  Closing the store with a case
  unfinished (e.g. SIGTERM, below) keeps the rows of its completed appends and cuts
  those of an append stopped part-way, so that all its series keep one length.
* Files use HDF5's default (earliest) format.  ``libver="latest"`` is deliberately not
  used: its superblock records "file open for writing", so a file left by a killed
  writer then refuses to open ("file is already open for write") until the flag is
  cleared with ``h5clear -s`` (measured with HDF5 2.0 / h5py 3.16: 3 of 3 writers killed
  mid-append left such files; with the default format 18 of 18 reopened with all
  completed cases intact; ``tests/test_hdf5_store.py`` repeats the latter).  A kill that
  lands inside a flush can still leave a file HDF5 refuses to open or list (the
  default format has no journal): a stress child writing 1-day cases back to back with
  no integration, flushes ~15 % of its time, killed at random: 4 of 60 files (store of
  commit 4b17676) and 5 of 60 (with the 256 KiB metadata cache) did not reopen, the
  rest had every completed case intact.  In a study run the integration dominates.
* While a :class:`StudyStore` is used as a context manager in the main thread with the
  default SIGTERM disposition, SIGTERM raises ``SystemExit(143)`` so that the ``with``
  block closes the file cleanly (SIGINT already raises ``KeyboardInterrupt``); if the
  exception lands where Python swallows it, the next append raises it again.

Units are SI (s, m, m/s, m/s^2, rad); time is seconds since the case epoch in TT.
"""

from __future__ import annotations

import ast
import datetime as _dt
import functools
import inspect
import json
import math
import os
import signal
import threading
import time
from pathlib import Path
from typing import Any, Iterator, Mapping, Sequence

import h5py
import numpy as np

__all__ = [
    "SCHEMA_NAME",
    "SCHEMA_VERSION",
    "STATUS_RUNNING",
    "STATUS_COMPLETE",
    "STATUS_FAILED",
    "STATUS_INTERRUPTED",
    "STATE_COLUMNS",
    "STATE_UNITS",
    "ELEMENT_COLUMNS",
    "ELEMENT_UNITS",
    "StudyStore",
    "CaseWriter",
    "read_case",
    "iter_case_rows",
    "mark_unfinished_as_interrupted",
    "software_version",
    "constants_table",
    "open_for_reading",
]

SCHEMA_NAME = "longarc-study-trajectories"
SCHEMA_VERSION = 1

STATUS_RUNNING = "running"
STATUS_COMPLETE = "complete"
STATUS_FAILED = "failed"
STATUS_INTERRUPTED = "interrupted"
_STATUSES = (STATUS_RUNNING, STATUS_COMPLETE, STATUS_FAILED, STATUS_INTERRUPTED)

STATE_COLUMNS = ("x", "y", "z", "vx", "vy", "vz")
STATE_UNITS = ("m", "m", "m", "m/s", "m/s", "m/s")
ELEMENT_COLUMNS = ("semi_major_axis", "eccentricity", "inclination", "raan",
                   "argument_of_perigee", "true_anomaly")
ELEMENT_UNITS = ("m", "1", "rad", "rad", "rad", "rad")
RIC_COLUMNS = ("radial", "in_track", "cross_track")

CASES_GROUP = "cases"
DEFAULT_CHUNK_ROWS = 4096
MAX_CHUNK_BYTES = 256 * 1024
"""Upper bound of one chunk [bytes]: wide rows (STM, sensitivities) get fewer rows per chunk."""
SMALL_CASE_BYTES = 128 * 1024
"""A case whose time series total at most this many bytes [bytes] (1 day at 5-minute
output with states, ITRF states, elements and five accelerations: ~80 kB) is held in
memory while it is appended and written whole when it ends, each series in one
contiguous, unfiltered dataset of fixed extent (see :meth:`CaseWriter.append`)."""
CHUNK_CACHE_BYTES = 4 * 1024 * 1024
"""HDF5 raw-data chunk cache of each open dataset [bytes]: holds the partially filled
chunk between appends (a chunk is at most 256 KiB); written chunks are evicted first
(``rdcc_w0 = 1``), so memory stays bounded however long the arc."""
METADATA_CACHE_BYTES = 256 * 1024
"""Size of the HDF5 metadata cache of a study file opened for writing [bytes], fixed
(no adaptive resizing).  Every flush scans all the entries of the cache
(``H5C_set_slist_enabled``), so with HDF5's default (2 MiB, adaptive) a flush got
slower as the cases of a run filled it (~2000 entries after ~100 1-day cases); at
256 KiB (~250 entries, the metadata of several cases) a short case cost ~0.3 ms less
(measured, h5py 3.16 / HDF5 2.0: 1.24 -> 0.90 ms of store time per case over 600
cases; 128 KiB - 512 KiB within 5 %).  Entries of finished cases are clean (flushed)
and simply evicted; what a crash leaves is unchanged: the store's flush points decide
what is on disk."""

_STR = h5py.string_dtype(encoding="utf-8")


# --------------------------------------------------------------------------------------
# Small helpers
# --------------------------------------------------------------------------------------
@functools.lru_cache(maxsize=1)
def software_version() -> str:
    """Installed version of the ``longarc`` distribution, or ``"unknown"`` (read once per
    process: the package metadata lookup costs ~0.7 ms)."""
    try:
        from importlib.metadata import version

        return version("longarc")
    except Exception:  # PackageNotFoundError or a broken metadata install
        return "unknown"


_UTC_DAYS: dict[int, str] = {}


def _utc_now() -> str:
    """The system clock as ``YYYY-MM-DDThh:mm:ss.ffffffZ`` (UTC; POSIX time, so no leap
    seconds, like ``datetime.now(timezone.utc)``), with the date text made once per day
    (two time stamps per case; ``strftime`` cost ~20 us each between integrations)."""
    us = time.time_ns() // 1000
    s, frac = divmod(us, 1_000_000)
    day, sod = divmod(s, 86400)
    date = _UTC_DAYS.get(day)
    if date is None:
        if len(_UTC_DAYS) > 64:
            _UTC_DAYS.clear()
        date = _UTC_DAYS[day] = time.strftime("%Y-%m-%d", time.gmtime(day * 86400))
    h, rem = divmod(sod, 3600)
    m, sec = divmod(rem, 60)
    return f"{date}T{h:02d}:{m:02d}:{sec:02d}.{frac:06d}Z"


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, (Path, _dt.datetime, _dt.date)):
        return str(obj)
    if isinstance(obj, (set, frozenset, tuple)):
        return list(obj)
    return repr(obj)


def _to_json(obj: Any) -> str:
    return json.dumps(obj, default=_json_default, sort_keys=True, allow_nan=True)


def _attr_value(value: Any) -> Any:
    """Map a Python value onto something h5py stores as an attribute (JSON otherwise)."""
    if isinstance(value, str):
        return value
    if isinstance(value, (bool, np.bool_)):
        return np.bool_(value)
    if isinstance(value, (int, np.integer)):
        return np.int64(value)
    if isinstance(value, (float, np.floating)):
        return np.float64(value)
    if value is None:
        return ""
    if isinstance(value, (list, tuple)) and value and all(isinstance(v, str) for v in value):
        return np.array(list(value), dtype=_STR)
    if (isinstance(value, (list, tuple)) and value
            and all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
                    for v in value)):
        return np.array(value, dtype=np.float64)
    if isinstance(value, np.ndarray) and value.dtype.kind in "fiub":
        return value
    return _to_json(value)


_HTYPES: dict[Any, Any] = {}


def _htypes(dtype: np.dtype) -> tuple[Any, Any]:
    """(file type, memory type) of ``dtype`` exactly as h5py's
    ``AttributeManager.create`` makes them (``h5t.py_create(dtype, logical=True)`` and
    ``h5t.py_create(dtype)``), cached per dtype."""
    key = (dtype.str, dtype.kind == "O" and h5py.check_string_dtype(dtype))
    t = _HTYPES.get(key)
    if t is None:
        t = _HTYPES[key] = (h5py.h5t.py_create(dtype, logical=True), h5py.h5t.py_create(dtype))
    return t


def _attr_data(value: Any) -> np.ndarray | None:
    """The array :func:`_set_attrs` stores for ``value`` (mapped by :func:`_attr_value`),
    or None for a value only h5py's general path handles."""
    v = _attr_value(value)
    if isinstance(v, str):
        data = np.array(v, dtype=_STR)
    elif isinstance(v, np.ndarray):
        data = v
    else:
        data = np.asarray(v)
    if data.dtype.kind not in "fiubO" or (data.dtype.kind == "O" and not h5py.check_string_dtype(data.dtype)):
        return None
    return data


def _same_data(a: np.ndarray, b: np.ndarray) -> bool:
    """True if two attribute arrays of the same dtype and shape hold the same values
    (numbers bitwise, strings by text)."""
    if a.dtype.kind == "O":
        return a.tolist() == b.tolist()
    return a.tobytes() == b.tobytes()


def _write_attr(oid: Any, name: bytes, data: np.ndarray, new: bool) -> None:
    """Create (or overwrite) attribute ``name`` of the object ``oid`` with ``data``.

    An existing attribute of the same HDF5 type and shape is written in place (same
    stored type, shape and value as deleting and re-creating it, ~30 % cheaper);
    otherwise it is deleted first, as h5py does."""
    htype, mtype = _htypes(data.dtype)
    if not new and h5py.h5a.exists(oid, name):
        attr = h5py.h5a.open(oid, name)
        try:
            if attr.shape == data.shape and attr.get_type().equal(htype):
                attr.write(data, mtype=mtype)
                return
        finally:
            attr.close()
        h5py.h5a.delete(oid, name)
    attr = h5py.h5a.create(oid, name, htype, h5py.h5s.create_simple(data.shape))
    try:
        attr.write(data, mtype=mtype)
    except Exception:
        attr.close()
        h5py.h5a.delete(oid, name)
        raise
    attr.close()


def _set_attrs(obj: h5py.HLObject, values: Mapping[str, Any], *, new: bool = False) -> None:
    """Write several attributes of ``obj`` (values mapped by :func:`_attr_value`).

    Same stored types, shapes and values as ``obj.attrs[key] = _attr_value(value)``
    (``tests/test_runner.py`` compares the two), through h5py's low-level ``h5a``
    calls with cached HDF5 types: ~25 us per attribute instead of ~70 us, which is
    most of the bookkeeping cost of a short case (~50 attributes).  ``new=True``: the
    object was just created, so no attribute needs deleting first.
    """
    oid = obj.id
    for key, value in values.items():
        data = _attr_data(value)
        if data is None:
            obj.attrs[key] = _attr_value(value)  # anything unusual: h5py's general path
            continue
        _write_attr(oid, key.encode("utf-8"), data, new)


# --------------------------------------------------------------------------------------
# Templates: objects copied whole instead of built attribute by attribute
# --------------------------------------------------------------------------------------
class _Templates:
    """Per-process in-memory HDF5 file ("core" driver, no backing store) holding
    template objects: an empty time-series dataset with its attributes, a case group
    with its attributes.  A case copies them into the study file with one ``H5Ocopy``
    each (``h5py.h5o.copy``: the object header, its attributes and creation properties
    are copied as they are) instead of creating the object and ~20 attributes one by
    one: measured ~0.12 ms for a case group with 22 attributes and three datasets
    against ~0.8 ms.  The stored objects are the same as those built directly
    (``tests/test_runner.py`` compares types, shapes, values and creation property
    lists)."""

    def __init__(self) -> None:
        self.pid = os.getpid()
        self.file = h5py.File(f"longarc-templates-{self.pid}-{id(self)}.h5", "w", driver="core",
                              backing_store=False)
        self.series: dict[tuple, bytes] = {}
        self.groups: dict[tuple, _GroupTemplate] = {}
        self.whole: dict[tuple, list] = {}
        """Contiguous series of fixed shape, kept open: [name, dataset id, bytes of the
        data it holds]."""
        self._made = 0

    def name(self) -> bytes:
        self._made += 1
        return f"t{self._made}".encode("ascii")


class _GroupTemplate:
    """A template group (:func:`_create_group_with_attrs`): its name in the template
    file, its attribute values (plain values as given, the others as their arrays), the
    values of the last group made from it and how many groups in a row had values that
    differed from the template's but equalled those of the group before (the template
    is then remade with the current values, see :data:`TEMPLATE_REFRESH_STREAK`)."""

    __slots__ = ("tname", "values", "prev", "streak", "remade")

    def __init__(self, tname: bytes, values: dict[str, Any]) -> None:
        self.tname = tname
        self.values = values
        self.prev: dict[str, Any] = values
        self.streak = 0
        self.remade = 0


_TEMPLATES: _Templates | None = None
_TEMPLATE_LOCK = threading.RLock()
"""Guards the creation of templates (a Dask worker runs cases in several threads)."""
TEMPLATE_LIMIT = 256
"""Templates kept per process (each a few kB); beyond it objects are built directly."""
TEMPLATE_REFRESH_STREAK = 4
"""A template group is remade with the current values after this many groups in a row
wrote a value that differed from the template's but equalled the group before's (e.g.
the sweep name and span of a sweep's cases after a template made by an explicit case:
two attribute writes per case, ~30 us each, against ~0.3 ms to remake the template)."""
TEMPLATE_REMAKES = 4
"""At most this many remakes per template key (the replaced templates stay in the
template file: another thread may be copying them)."""
WHOLE_TEMPLATE_LIMIT = 64
"""Of those, templates of whole series (each holds the data of its last copy, at most
:data:`SMALL_CASE_BYTES`: 8 MiB at most in all)."""


def _templates() -> _Templates:
    global _TEMPLATES
    with _TEMPLATE_LOCK:
        if _TEMPLATES is None or _TEMPLATES.pid != os.getpid():  # a forked child makes its own
            _TEMPLATES = _Templates()
        return _TEMPLATES


_ASCII_LCPL: Any = None


def _copy_template(tpl: _Templates, tname: bytes, parent: h5py.Group, name: str) -> bytes:
    """Copy template ``tname`` to ``parent/name`` (an ASCII name) with the link creation
    property list h5py uses for an ASCII name (intermediate groups, ASCII character
    set), made once instead of per call (~25 us).  Returns the encoded name."""
    global _ASCII_LCPL
    if _ASCII_LCPL is None:
        _ASCII_LCPL = parent._e("a", lcpl=True)[1]
    enc = name.encode("ascii")
    h5py.h5o.copy(tpl.file.id, tname, parent.id, enc, lcpl=_ASCII_LCPL)
    return enc


def _attr_key(data: Mapping[str, np.ndarray]) -> tuple:
    """Names, types and shapes of a set of attribute arrays (what a template fixes)."""
    return tuple((k, v.dtype.str, v.dtype.kind == "O", v.shape) for k, v in data.items())


def _attr_values_key(data: Mapping[str, np.ndarray]) -> tuple:
    """Names, types, shapes and values of a set of attribute arrays (a template key)."""
    return tuple((k, v.dtype.str, v.shape, tuple(v.tolist()) if v.dtype.kind == "O" else v.tobytes())
                 for k, v in data.items())


_ATTRS_KEYS: dict[int, tuple[Mapping[str, Any], tuple | None]] = {}


def _attrs_key_cached(attrs: Mapping[str, Any]) -> tuple | None:
    """:func:`_attr_values_key` of a constant attribute mapping (the series attributes
    of this module), cached by object; None if a value takes h5py's general path."""
    got = _ATTRS_KEYS.get(id(attrs))
    if got is not None and got[0] is attrs:
        return got[1]
    data = {k: _attr_data(v) for k, v in attrs.items()}
    key = None if any(v is None for v in data.values()) else _attr_values_key(data)  # type: ignore[arg-type]
    if len(_ATTRS_KEYS) > 1024:
        _ATTRS_KEYS.clear()
    _ATTRS_KEYS[id(attrs)] = (attrs, key)  # the mapping is kept alive, so its id stays its own
    return key


_PLAIN_TYPES = (str, int, float, bool)
"""Exact Python types whose stored attribute (:func:`_attr_value`) follows from the type
alone: ``str`` -> variable-length UTF-8 string, ``int`` -> int64, ``float`` -> float64,
``bool`` -> numpy bool (h5py's enum); a template group compares such values without
converting them (:func:`_same_plain`)."""


def _same_plain(a: Any, b: Any) -> bool:
    """True if two plain values (:data:`_PLAIN_TYPES`) store the same attribute: same
    exact type and value, floats bitwise (-0.0 is not 0.0, a NaN is never the same)."""
    if type(a) is not type(b):
        return False
    if a != b:
        return False
    return type(a) is not float or a != 0.0 or math.copysign(1.0, a) == math.copysign(1.0, b)


def _attr_sig(key: str, value: Any) -> tuple | None:
    """Template key part of one attribute: its exact type for a plain value, else None
    (the value's array decides, see :func:`_attr_key`)."""
    t = type(value)
    return (key, t) if t in _PLAIN_TYPES else None


def _create_group_with_attrs(parent: h5py.Group, name: str, values: Mapping[str, Any]) -> h5py.Group:
    """``parent.create_group(name)`` followed by ``_set_attrs(group, values, new=True)``,
    through a template group copied whole: the template (made once per set of attribute
    names, types and shapes) holds the values of the first group made from it (remade
    with newer values when it keeps disagreeing with groups that agree with each other,
    :data:`TEMPLATE_REFRESH_STREAK`); the values that differ are then written in place
    (same type and shape).

    Plain values (``str``, ``int``, ``float``, ``bool``) are compared with the template's
    as Python values (:func:`_same_plain`) and converted only when they differ: a case
    group has ~20 attributes of which ~6 change from case to case."""
    if not name.isascii():
        grp = parent.create_group(name)
        _set_attrs(grp, values, new=True)
        return grp
    sig: list[tuple] = []
    other: dict[str, np.ndarray] = {}  # arrays of the values that are not plain
    for k, v in values.items():
        s = _attr_sig(k, v)
        if s is None:
            d = _attr_data(v)
            if d is None:  # a value only h5py's general path handles: build it directly
                grp = parent.create_group(name)
                _set_attrs(grp, values, new=True)
                return grp
            other[k] = d
            s = (k, d.dtype.str, d.dtype.kind == "O", d.shape)
        sig.append(s)
    key = tuple(sig)
    tpl = _templates()
    # plain values as given, the others as (copies of) their arrays
    cur = {k: (other[k].copy() if k in other else v) for k, v in values.items()} if other else dict(values)
    with _TEMPLATE_LOCK:
        made = tpl.groups.get(key)
        if made is None:
            if len(tpl.groups) + len(tpl.series) + len(tpl.whole) >= TEMPLATE_LIMIT:
                made = None
            else:
                made = tpl.groups[key] = _GroupTemplate(_make_template_group(tpl, values), cur)
    if made is None:  # too many kinds of groups: build it directly
        grp = parent.create_group(name)
        _set_attrs(grp, values, new=True)
        return grp
    tvals, prev = made.values, made.prev
    oid = h5py.h5g.open(parent.id, _copy_template(tpl, made.tname, parent, name))
    stale = False
    for k, v in values.items():
        d = other.get(k)
        if d is None:
            if _same_plain(v, tvals[k]):
                continue
            stale = stale or _same_plain(v, prev[k])
            d = _attr_data(v)
        else:
            if _same_data(d, tvals[k]):
                continue
            stale = stale or _same_data(d, prev[k])
        attr = h5py.h5a.open(oid, k.encode("utf-8"))
        try:
            attr.write(d, mtype=_htypes(d.dtype)[1])  # type: ignore[union-attr]
        finally:
            attr.close()
    with _TEMPLATE_LOCK:
        made.prev = cur
        made.streak = made.streak + 1 if stale else 0
        if made.streak >= TEMPLATE_REFRESH_STREAK and made.remade < TEMPLATE_REMAKES \
                and tpl.groups.get(key) is made:
            remade = _GroupTemplate(_make_template_group(tpl, values), cur)
            remade.remade = made.remade + 1
            tpl.groups[key] = remade
    return h5py.Group(oid)


def _make_template_group(tpl: _Templates, values: Mapping[str, Any]) -> bytes:
    """A new template group in ``tpl`` with the attributes ``values``; its name."""
    tname = tpl.name()
    g = tpl.file.create_group(tname.decode())
    _set_attrs(g, values, new=True)
    return tname


def _overwrite_plain_attrs(obj: h5py.HLObject, values: Mapping[str, Any]) -> None:
    """Write plain values (:data:`_PLAIN_TYPES`) over attributes of ``obj`` that exist
    with the type and shape those values store (this module created them from plain
    values of the same types, e.g. ``status``, ``finished_utc``, ``n_samples`` of a case
    group made by :meth:`StudyStore.begin_case`): open, write, close, without the
    existence and type checks of :func:`_set_attrs` (~25 us less per attribute).  Any
    other value, or an attribute that is missing, goes through :func:`_set_attrs`."""
    oid = obj.id
    rest: dict[str, Any] = {}
    for k, v in values.items():
        if type(v) not in _PLAIN_TYPES:
            rest[k] = v
            continue
        name = k.encode("utf-8")
        if not h5py.h5a.exists(oid, name):
            rest[k] = v
            continue
        d = _attr_data(v)
        attr = h5py.h5a.open(oid, name)
        try:
            attr.write(d, mtype=_htypes(d.dtype)[1])  # type: ignore[union-attr]
        finally:
            attr.close()
    if rest:
        _set_attrs(obj, rest)


def _read_attrs(obj: h5py.HLObject) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, val in obj.attrs.items():
        if isinstance(val, bytes):
            val = val.decode("utf-8")
        elif isinstance(val, np.ndarray) and val.dtype.kind == "O":
            val = [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in val.tolist()]
        elif isinstance(val, np.generic):
            val = val.item()
        out[key] = val
    return out


def _str_list(val: Any) -> list[str]:
    if val is None:
        return []
    if isinstance(val, (str, bytes)):
        val = [val]
    return [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in np.asarray(val).tolist()]


@functools.lru_cache(maxsize=1)
def constants_table() -> dict[str, dict[str, Any]]:
    """Every public numeric constant of `propagator.constants` with its documented source.

    Returns ``{NAME: {"value": float, "description": docstring}}``; the description is
    the string literal that follows the assignment in ``constants.py`` (where the
    source of the value is cited), or ``""``.
    """
    from propagator import constants as mod

    docs: dict[str, str] = {}
    try:
        tree = ast.parse(inspect.getsource(mod))
        body = tree.body
        for node, nxt in zip(body, body[1:] + [None]):
            target = None
            if isinstance(node, ast.AnnAssign) and isinstance(node.target, ast.Name):
                target = node.target.id
            elif isinstance(node, ast.Assign) and len(node.targets) == 1 and isinstance(node.targets[0], ast.Name):
                target = node.targets[0].id
            if (target and isinstance(nxt, ast.Expr) and isinstance(nxt.value, ast.Constant)
                    and isinstance(nxt.value.value, str)):
                docs[target] = nxt.value.value.strip()
    except (OSError, TypeError, SyntaxError):  # source not available: values only
        pass
    table: dict[str, dict[str, Any]] = {}
    for name in sorted(vars(mod)):
        if not name.isupper() or name.startswith("_"):
            continue
        value = getattr(mod, name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            table[name] = {"value": float(value), "description": docs.get(name, "")}
    return table


@functools.lru_cache(maxsize=1)
def _constants_json() -> str:
    """:func:`constants_table` as the JSON text of the ``constants_json`` case attribute
    (built once per process)."""
    return _to_json(constants_table())


def _chunk_rows(row_shape: tuple[int, ...], itemsize: int, chunk_rows: int) -> int:
    row_bytes = max(1, int(np.prod(row_shape, dtype=np.int64)) * itemsize)
    return int(max(16, min(chunk_rows, MAX_CHUNK_BYTES // row_bytes)))


def _set_metadata_cache(f: h5py.File, nbytes: int) -> None:
    """Give the open file ``f`` a metadata cache of fixed size ``nbytes`` (adaptive
    resizing off: ``incr_mode``, ``flash_incr_mode`` and ``decr_mode`` = off), see
    :data:`METADATA_CACHE_BYTES`."""
    cfg = f.id.get_mdc_config()
    cfg.set_initial_size = True
    cfg.initial_size = cfg.min_size = cfg.max_size = int(nbytes)
    cfg.incr_mode = 0        # H5C_incr__off
    cfg.flash_incr_mode = 0  # H5C_flash_incr__off
    cfg.decr_mode = 0        # H5C_decr__off
    f.id.set_mdc_config(cfg)


def open_for_reading(path: str | os.PathLike) -> h5py.File:
    """Open a study file read-only.

    If another process holds the file open for writing (HDF5 file locking refuses the
    open), retry without locking: the reader then sees the state of the last flush,
    which is the documented crash-consistency point of the store.
    """
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        if "lock" not in str(exc).lower():
            raise
        return h5py.File(path, "r", locking=False)


# --------------------------------------------------------------------------------------
# Store
# --------------------------------------------------------------------------------------
class StudyStore:
    """A study's HDF5 file (schema ``longarc-study-trajectories``); a context manager.

    Args:
        path: file name; created with ``mode="a"``/``"w"`` if absent.
        study_name: written to the root attribute ``study_name`` of a new file (or of a
            file whose ``study_name`` is still empty).
        mode: h5py mode: ``"a"`` (default, read/write, create), ``"w"`` (truncate),
            ``"r"`` (read only).
        compression: ``"lzf"`` (default), ``"gzip"`` or ``"none"``; the shuffle filter is
            always applied before compression.
        gzip_level: gzip level 0-9 (used with ``compression="gzip"``).
        chunk_rows: rows per chunk along the time axis (fewer for wide rows, so that a
            chunk stays below 256 KiB).
        flush_interval_s: while appending, flush the file at most this often [s].
        in_memory: keep the file in memory only (HDF5 "core" driver without backing
            store; ``path`` is then just a name): for a worker process that hands its
            case to the parent as :meth:`file_image` bytes instead of a file on disk.
            Needs ``mode="w"``.
        small_case_bytes: a case whose time series total at most this many bytes is
            held in memory and written whole when it ends (:meth:`CaseWriter.append`);
            0 streams every case into chunked datasets.
    """

    def __init__(self, path: str | os.PathLike, study_name: str = "", mode: str = "a",
                 compression: str = "lzf", *, gzip_level: int = 4,
                 chunk_rows: int = DEFAULT_CHUNK_ROWS, flush_interval_s: float = 10.0,
                 in_memory: bool = False, small_case_bytes: int = SMALL_CASE_BYTES) -> None:
        if compression not in ("lzf", "gzip", "none"):
            raise ValueError(f"compression must be 'lzf', 'gzip' or 'none', got {compression!r}")
        if not (isinstance(gzip_level, int) and 0 <= gzip_level <= 9):
            raise ValueError(f"gzip_level must be an int in 0..9, got {gzip_level!r}")
        if mode not in ("a", "w", "r", "r+"):
            raise ValueError(f"mode must be 'a', 'w', 'r+' or 'r', got {mode!r}")
        self.path = Path(path)
        self.mode = mode
        self.compression = compression
        self.gzip_level = gzip_level
        self.chunk_rows = int(chunk_rows)
        self.flush_interval_s = float(flush_interval_s)
        self.small_case_bytes = int(small_case_bytes)
        self._last_flush = time.monotonic()
        self._writers: dict[str, CaseWriter] = {}
        self._cases_grp: h5py.Group | None = None
        self._series_plists: dict[tuple, tuple[Any, Any]] = {}
        self._old_sigterm: Any = None
        self.in_memory = bool(in_memory)
        if self.in_memory:
            if mode != "w":
                raise ValueError("in_memory=True needs mode='w'")
            self._f = h5py.File(self.path, mode, driver="core", backing_store=False,
                                rdcc_nbytes=CHUNK_CACHE_BYTES, rdcc_nslots=4001, rdcc_w0=1.0)
        elif mode == "r":
            self._f = open_for_reading(self.path)
        else:
            self._f = h5py.File(self.path, mode, rdcc_nbytes=CHUNK_CACHE_BYTES, rdcc_nslots=4001, rdcc_w0=1.0)
        if mode != "r":
            _set_metadata_cache(self._f, METADATA_CACHE_BYTES)
        self._init_root(study_name)

    # --- file-level ---------------------------------------------------------------
    def _init_root(self, study_name: str) -> None:
        f = self._f
        name = f.attrs.get("schema_name")
        if name is None:
            if self.mode == "r":
                raise ValueError(f"{self.path}: not a longarc study file (no schema_name attribute)")
            _set_attrs(f, {"schema_name": SCHEMA_NAME, "schema_version": np.int64(SCHEMA_VERSION),
                           "software_version": software_version(), "created_utc": _utc_now(),
                           "study_name": str(study_name)})
            f.require_group(CASES_GROUP)
            f.flush()
            return
        if isinstance(name, bytes):
            name = name.decode()
        if name != SCHEMA_NAME:
            raise ValueError(f"{self.path}: schema {name!r} is not {SCHEMA_NAME!r}")
        version = int(f.attrs.get("schema_version", -1))
        if version > SCHEMA_VERSION:
            raise ValueError(f"{self.path}: schema version {version} is newer than this "
                             f"longarc understands ({SCHEMA_VERSION}); update longarc")
        if self.mode != "r":
            if study_name and not f.attrs.get("study_name", ""):
                f.attrs["study_name"] = study_name
            f.require_group(CASES_GROUP)

    @property
    def file(self) -> h5py.File:
        """The underlying ``h5py.File``.  Samples that open writers hold in memory are
        written first, so that the file holds every sample appended so far."""
        if self.mode != "r":
            for writer in self._writers.values():
                if writer._pending and not writer._closed:
                    writer._write_pending()
        return self._f

    def set_root_attrs(self, values: Mapping[str, Any]) -> None:
        """Write attributes of the file's root group (e.g. the runner's
        ``study_description``), stored as ``f.attrs[key] = value`` would store them."""
        self._require_writable()
        _set_attrs(self._f, values)

    @property
    def study_name(self) -> str:
        return str(self._f.attrs.get("study_name", ""))

    def flush(self) -> None:
        """Write HDF5 buffers and metadata to disk (the crash-consistency point)."""
        if self._f.id.valid and self.mode != "r":
            self._f.flush()
        self._last_flush = time.monotonic()

    def _maybe_flush(self) -> None:
        if time.monotonic() - self._last_flush >= self.flush_interval_s:
            self.flush()

    def file_image(self) -> bytes:
        """The whole file as bytes, after a flush (what a file written by this store
        would hold); :meth:`import_case_from` accepts it."""
        self.flush()
        return self._f.id.get_file_image()

    def close(self) -> None:
        """Flush and close the file (unfinished writers keep status ``"running"``).

        The case of an unfinished writer keeps the samples of its completed appends:
        samples held in memory are written, and rows of an append stopped part-way (a
        signal between its datasets) are cut, as :meth:`mark_interrupted` does."""
        for writer in self._writers.values():
            if self.mode != "r" and not writer._closed and writer._grp.id.valid:
                try:
                    writer._truncate_to_committed()
                except Exception:  # pragma: no cover - best effort; the file still closes
                    pass
            writer._datasets.clear()  # open datasets are released before the file closes
        if self._f.id.valid:
            if self.mode != "r":
                self._f.flush()
            self._f.close()
        self._writers.clear()

    def __enter__(self) -> "StudyStore":
        global _termination_signal
        _termination_signal = None
        if (threading.current_thread() is threading.main_thread()
                and signal.getsignal(signal.SIGTERM) is signal.SIG_DFL):
            self._old_sigterm = signal.SIG_DFL
            signal.signal(signal.SIGTERM, _raise_system_exit)
        return self

    def __exit__(self, *exc: Any) -> None:
        try:
            self.close()
        finally:
            if self._old_sigterm is not None:
                signal.signal(signal.SIGTERM, self._old_sigterm)
                self._old_sigterm = None

    def __del__(self) -> None:  # pragma: no cover - best effort on garbage collection
        try:
            if self._f.id.valid:
                self.close()
        except Exception:
            pass

    # --- queries ------------------------------------------------------------------
    def _cases(self) -> h5py.Group:
        grp = self._cases_grp
        if grp is None or not grp.id.valid:  # looked up once (~40 us per lookup)
            grp = self._cases_grp = self._f[CASES_GROUP]
        return grp

    def case_names(self) -> list[str]:
        """Names of all case groups, sorted."""
        cases = self._f.get(CASES_GROUP)
        return sorted(cases.keys()) if cases is not None else []

    def case_status(self, name: str) -> str | None:
        """The case's ``status`` attribute, or None if the case is absent."""
        cases = self._f.get(CASES_GROUP)
        grp = cases.get(name) if cases is not None else None
        if grp is None:
            return None
        status = grp.attrs.get("status")
        if isinstance(status, bytes):
            status = status.decode()
        return None if status is None else str(status)

    def completed_cases(self) -> set[str]:
        """Names of the cases whose status is ``"complete"`` (read from the file); cases
        ``"running"``, ``"failed"`` or ``"interrupted"`` are not complete."""
        return {n for n in self.case_names() if self.case_status(n) == STATUS_COMPLETE}

    # --- writing ------------------------------------------------------------------
    def _require_writable(self) -> None:
        if self.mode == "r":
            raise PermissionError(f"{self.path} is open read-only")

    def delete_case(self, name: str) -> None:
        """Remove a case group (no-op if absent).  The space is reused by later writes."""
        self._require_writable()
        if name in self._writers:
            self._writers.pop(name)._closed = True
        cases = self._cases()
        if cases.id.links.exists(name.encode("utf-8")):
            del cases[name]

    def begin_case(self, name: str, *, epoch_iso: str, epoch_jd1: float, epoch_jd2: float,
                   epoch_scale: str, case_config_toml: str, force_models: list[dict],
                   extra_attrs: dict | None = None, expected_rows: int | None = None) -> "CaseWriter":
        """Create the group ``/cases/<name>`` with status ``"running"`` and return its writer.

        An existing group of that name (a stale unfinished case, or a case the caller
        chose to recompute) is deleted first.  The file is flushed, so a crash from here
        on leaves the case visible with status ``"running"``.  ``expected_rows``: the
        number of samples the case will have, when known; the time series then get
        chunks of at most that many rows (a storage detail: any number of rows can still
        be appended).
        """
        self._require_writable()
        _check_termination()
        _check_case_name(name)
        self.delete_case(name)
        attrs = {
            "status": STATUS_RUNNING,
            "error": "",
            "traceback": "",
            "epoch_iso": str(epoch_iso),
            "epoch_jd1": float(epoch_jd1),
            "epoch_jd2": float(epoch_jd2),
            "epoch_scale": str(epoch_scale),
            "time_scale": "TT",
            "case_config_toml": str(case_config_toml),
            "force_models_json": _to_json(list(force_models)),
            "constants_json": _constants_json(),
            "software_version": software_version(),
            "started_utc": _utc_now(),
            "finished_utc": "",
            "n_samples": 0,
        }
        for key, val in (extra_attrs or {}).items():
            if key in attrs:
                raise ValueError(f"extra attribute {key!r} clashes with a schema attribute of the case")
            attrs[key] = val
        grp = _create_group_with_attrs(self._cases(), name, attrs)
        self.flush()
        writer = CaseWriter(self, grp, expected_rows=expected_rows, name=name)
        self._writers[name] = writer
        return writer

    def mark_failed(self, name: str, error: str, traceback_text: str = "") -> None:
        """Set a case's status to ``"failed"`` with the error text and traceback.

        Creates a bare case group when the case never began (e.g. it failed while its
        force models were prepared).  Flushes the file.
        """
        self._require_writable()
        _check_case_name(name)
        grp = self._cases().get(name)
        if grp is None:
            grp = self._cases().create_group(name)
            _set_attrs(grp, {"started_utc": _utc_now(), "software_version": software_version(),
                             "n_samples": np.int64(0)}, new=True)
        _set_attrs(grp, {"status": STATUS_FAILED, "error": str(error), "traceback": str(traceback_text),
                         "finished_utc": _utc_now()})
        writer = self._writers.pop(name, None)
        if writer is not None:
            writer._write_held()
            _set_attrs(grp, {"n_samples": np.int64(writer._file_rows)})
            writer._closed = True
        self.flush()

    def mark_interrupted(self, name: str, reason: str) -> None:
        """Set a case's status to ``"interrupted"`` (stopped on request, not by an error).

        ``reason`` goes to the ``error`` attribute (``traceback`` is ``""``) and
        ``finished_utc`` is set.  The samples written so far stay readable: when the case
        has an open writer, every time-indexed dataset is cut to the ``n_samples`` rows
        whose append completed (an append stopped by a signal between its datasets may
        have left a longer, partly filled one) and the events to the rows whose
        :meth:`CaseWriter.add_events` completed; the writer is then closed.  Creates a
        bare case group when the case never began.  Flushes the file.  An interrupted
        case is not complete: :meth:`completed_cases` leaves it out and a rerun
        recomputes it.
        """
        self._require_writable()
        _check_case_name(name)
        grp = self._cases().get(name)
        if grp is None:
            grp = self._cases().create_group(name)
            _set_attrs(grp, {"started_utc": _utc_now(), "software_version": software_version(),
                             "n_samples": np.int64(0)}, new=True)
        writer = self._writers.pop(name, None)
        if writer is not None:
            writer._truncate_to_committed()
            writer._closed = True
        _label_interrupted(grp, reason)
        grp.attrs["finished_utc"] = _utc_now()
        self.flush()

    def import_case_from(self, other_path: str | os.PathLike | bytes, name: str) -> None:
        """Copy the case group ``name`` from another study file (e.g. a per-worker file),
        given by its path or as a file image (bytes, e.g. :meth:`file_image` of an
        in-memory store of a worker process).

        The group is copied whole (datasets with their chunking and filters, attributes,
        status).  An existing group of that name in this file is replaced.  Raises
        ``KeyError`` if the other file has no such case.
        """
        self._require_writable()
        if isinstance(other_path, (bytes, bytearray, memoryview)):
            label = "file image"
            src = h5py.File(h5py.h5f.open_file_image(bytes(other_path)))
        else:
            other_path = Path(other_path)
            label = str(other_path)
            if other_path.resolve() == self.path.resolve():
                raise ValueError("import_case_from: source and destination are the same file")
            src = open_for_reading(other_path)
        with src:
            cases = src.get(CASES_GROUP)
            if cases is None or name not in cases:
                raise KeyError(f"{label}: no case {name!r}")
            self.delete_case(name)
            self._f.copy(cases[name], self._cases(), name=name)
        self.flush()

    # dataset creation used by CaseWriter
    def _filters(self) -> dict[str, Any]:
        if self.compression == "lzf":
            return {"compression": "lzf", "shuffle": True}
        if self.compression == "gzip":
            return {"compression": "gzip", "compression_opts": self.gzip_level, "shuffle": True}
        return {}

    def _series_rows(self, row_shape: tuple[int, ...], dtype: Any, rows_hint: int | None) -> int:
        """Rows per chunk: :attr:`chunk_rows` (fewer for wide rows, :func:`_chunk_rows`),
        and no more than ``rows_hint`` (the number of rows the dataset will get, when
        known): a 1-day case at 5-minute output has 289 rows, and compressing a 4096-row
        chunk that holds 289 of them costs ~0.3 ms per dataset for nothing."""
        is_str = h5py.check_string_dtype(np.dtype(dtype)) is not None
        itemsize = 16 if is_str else np.dtype(dtype).itemsize
        rows = _chunk_rows(row_shape, itemsize, self.chunk_rows)
        if rows_hint is not None and rows_hint >= 1:
            rows = min(rows, int(rows_hint))
        return rows

    def _create_series_with_attrs(self, parent: h5py.Group, name: str, row_shape: tuple[int, ...],
                                  attrs: Mapping[str, Any], rows_hint: int | None = None) -> h5py.Dataset:
        """:meth:`_create_series` followed by ``_set_attrs(ds, attrs, new=True)``, through
        a template dataset (see :class:`_Templates`) keyed by shape, chunking, filters and
        the attribute values: the same stored object, one ``H5Ocopy`` instead of a
        dataset creation and several attribute writes."""
        data = {k: _attr_data(v) for k, v in attrs.items()}
        rows = self._series_rows(row_shape, np.float64, rows_hint)
        tpl = _templates()
        if any(v is None for v in data.values()) or not name.isascii():
            ds = self._create_series(parent, name, row_shape, rows_hint=rows_hint)
            _set_attrs(ds, attrs, new=True)
            return ds
        key = (tuple(row_shape), rows, self.compression, self.gzip_level, _attr_values_key(data))  # type: ignore[arg-type]
        with _TEMPLATE_LOCK:
            tname = tpl.series.get(key)
            if tname is None and len(tpl.groups) + len(tpl.series) + len(tpl.whole) < TEMPLATE_LIMIT:
                tname = tpl.name()
                ds = tpl.file.create_dataset(tname.decode(), shape=(0, *row_shape), maxshape=(None, *row_shape),
                                             chunks=(rows, *row_shape), dtype=np.float64, **self._filters())
                _set_attrs(ds, attrs, new=True)
                tpl.series[key] = tname
        if tname is None:  # too many kinds of series: build it directly
            ds = self._create_series(parent, name, row_shape, rows_hint=rows_hint)
            _set_attrs(ds, attrs, new=True)
            return ds
        return h5py.Dataset(h5py.h5d.open(parent.id, _copy_template(tpl, tname, parent, name)))

    def _write_whole_series(self, parent: h5py.Group, name: str, data: np.ndarray,
                            attrs: Mapping[str, Any]) -> None:
        """Write the whole time series ``data`` (C-contiguous float64) as ``parent/name``
        with ``attrs``: contiguous layout, no filters, fixed extent (a short case written
        once it ended, see :data:`SMALL_CASE_BYTES`).

        Through a template dataset (:class:`_Templates`, in memory) keyed by the shape
        and the attribute values: the data are written into the template, which is then
        copied with them (one ``H5Ocopy``) instead of a dataset creation, a write and
        several attribute writes (measured per 289 x 6 series: ~0.07 ms, against ~0.11 ms
        when the copy is opened and written, ~0.2 ms built directly).  The
        stored object is the one ``parent.create_dataset(name, data=data)`` and
        ``_set_attrs(ds, attrs, new=True)`` make (``tests/test_runner.py``)."""
        vkey = _attrs_key_cached(attrs)
        if vkey is not None and name.isascii() and data.size:
            tpl = _templates()
            key = ("whole", data.shape, vkey)
            with _TEMPLATE_LOCK:
                tid = tpl.whole.get(key)
                if tid is None and len(tpl.whole) < WHOLE_TEMPLATE_LIMIT and \
                        len(tpl.groups) + len(tpl.series) + len(tpl.whole) < TEMPLATE_LIMIT:
                    tname = tpl.name()
                    ds = tpl.file.create_dataset(tname.decode(), shape=data.shape, dtype=np.float64)
                    _set_attrs(ds, attrs, new=True)
                    tid = tpl.whole[key] = [tname, ds.id, None]
                if tid is not None:
                    # the data go into the in-memory template, which is then copied with
                    # them (~40 us less per series than opening the copy and writing it);
                    # a template that holds these very bytes already (the time grid of a
                    # sweep's cases) is copied as it is
                    raw = data.tobytes()
                    if raw != tid[2]:
                        tid[1].write(h5py.h5s.ALL, h5py.h5s.ALL, data)
                        tid[2] = raw
                    _copy_template(tpl, tid[0], parent, name)
                    return
        # unusual attributes, no rows or too many kinds of series: built directly
        ds = parent.create_dataset(name, shape=data.shape, dtype=np.float64)
        _set_attrs(ds, attrs, new=True)
        if data.size:
            ds.id.write(h5py.h5s.ALL, h5py.h5s.ALL, data)

    def _create_series(self, parent: h5py.Group, name: str, row_shape: tuple[int, ...],
                       dtype: Any = np.float64, *, rows_hint: int | None = None) -> h5py.Dataset:
        is_str = h5py.check_string_dtype(np.dtype(dtype)) is not None
        rows = self._series_rows(row_shape, dtype, rows_hint)
        # variable-length strings live in the global heap: filters would only see references
        filters = {} if is_str else self._filters()
        key = (tuple(row_shape), np.dtype(dtype).str, is_str, rows)
        made = self._series_plists.get(key)
        if made is not None and name.isascii():
            # same creation property list and type as the first dataset of this kind,
            # which h5py made below: identical storage (chunks, filters, fill value, no
            # time stamps), ~4x less Python overhead than ``create_dataset``
            dcpl, tid = made
            space = h5py.h5s.create_simple((0, *row_shape), (h5py.h5s.UNLIMITED, *row_shape))
            return h5py.Dataset(h5py.h5d.create(parent.id, name.encode("ascii"), tid, space, dcpl=dcpl))
        ds = parent.create_dataset(name, shape=(0, *row_shape), maxshape=(None, *row_shape),
                                   chunks=(rows, *row_shape), dtype=dtype, **filters)
        self._series_plists[key] = (ds.id.get_create_plist(), ds.id.get_type())
        return ds


_termination_signal: int | None = None
"""Set by the SIGTERM handler; checked by the store's writing calls (see below)."""


def _raise_system_exit(signum: int, frame: Any) -> None:
    """SIGTERM handler installed while a store is open: raise ``SystemExit(128 + signum)``.

    Python runs signal handlers between bytecodes, which may be inside a weakref callback
    or ``__del__`` (h5py uses many), where exceptions are printed and swallowed.  The
    signal is therefore also recorded, and the next ``append`` / ``begin_case`` raises.
    """
    global _termination_signal
    _termination_signal = signum
    code = getattr(frame, "f_code", None)
    if code is not None and (code.co_name == "__del__" or code.co_filename.endswith("weakref.py")):
        return  # an exception here would be swallowed (and printed); the next append raises
    raise SystemExit(128 + signum)


def _label_interrupted(grp: h5py.Group, reason: str) -> None:
    """Status ``"interrupted"`` with ``reason`` in ``error`` (no traceback)."""
    grp.attrs["status"] = STATUS_INTERRUPTED
    grp.attrs["error"] = str(reason)
    grp.attrs["traceback"] = ""


def _check_termination() -> None:
    if _termination_signal is not None:
        raise SystemExit(128 + _termination_signal)


def _check_case_name(name: str) -> None:
    if not isinstance(name, str) or not name or "/" in name or name in (".", ".."):
        raise ValueError(f"case name must be a non-empty string without '/', got {name!r}")


def _append_rows(ds: h5py.Dataset, data: np.ndarray, at_row: int | None = None) -> None:
    """Grow ``ds`` along its first axis by the rows of ``data`` and write them.

    ``at_row``: write them from that row on and set the extent to ``at_row + len(data)``
    (rows beyond ``at_row`` left by an append interrupted part-way are overwritten or
    cut); default: after the last row.  C-contiguous float64 blocks go through the
    low-level calls (set_extent, one hyperslab, one write: the same bytes as
    ``ds[n0:n0 + m] = data`` without h5py's selection machinery, ~0.1 ms less per call);
    anything else through h5py.
    """
    dsid = ds.id
    space = dsid.get_space()
    shape = space.shape
    n0 = shape[0] if at_row is None else int(at_row)
    m = data.shape[0]
    if m == 0:
        return
    if (isinstance(data, np.ndarray) and data.dtype == np.float64 and data.flags.c_contiguous
            and data.shape[1:] == shape[1:] and ds.dtype == np.float64):
        dsid.set_extent((n0 + m, *shape[1:]))
        fspace = dsid.get_space()
        fspace.select_hyperslab((n0,) + (0,) * (len(shape) - 1), data.shape)
        dsid.write(h5py.h5s.create_simple(data.shape), fspace, data)
        return
    ds.resize(n0 + m, axis=0)
    ds[n0:n0 + m] = data


# --------------------------------------------------------------------------------------
# Case writer
# --------------------------------------------------------------------------------------
# attributes of the time series (one object each, so that their HDF5 forms are cached)
_TIME_ATTRS: Mapping[str, Any] = {"units": "s", "time_scale": "TT",
                                  "description": "seconds since the case epoch (epoch_* attributes), TT"}
_GCRF_ATTRS: Mapping[str, Any] = {"frame": "GCRF", "columns": list(STATE_COLUMNS), "units": list(STATE_UNITS)}
_ITRF_ATTRS: Mapping[str, Any] = {"frame": "ITRF", "columns": list(STATE_COLUMNS), "units": list(STATE_UNITS)}
_ELEMENT_ATTRS: Mapping[str, Any] = {
    "columns": list(ELEMENT_COLUMNS), "units": list(ELEMENT_UNITS), "frame": "GCRF",
    "description": "osculating Keplerian elements of the GCRF state (two-body, GM of the case's central body)"}
_STM_ATTRS: Mapping[str, Any] = {"units": "mixed (d state / d initial state, SI)",
                                 "description": "state transition matrix d x(t) / d x(t0), GCRF, "
                                                "state order x y z vx vy vz"}


@functools.lru_cache(maxsize=64)
def _acceleration_attrs(model: str) -> Mapping[str, Any]:
    return {"frame": "GCRF", "units": "m/s^2", "columns": ["ax", "ay", "az"], "model": model}


class CaseWriter:
    """Appends the time series, events and fits of one case; obtained from
    :meth:`StudyStore.begin_case`.

    Every :meth:`append` must give the same set of optional quantities (an optional
    dataset is created by its first block); all time-indexed datasets of the case keep
    the same length.
    """

    def __init__(self, store: StudyStore, group: h5py.Group, *, expected_rows: int | None = None,
                 name: str | None = None) -> None:
        self._store = store
        self._grp = group
        self._expected_rows = expected_rows
        self._datasets: dict[str, tuple[h5py.Dataset, tuple[int, ...]]] = {}
        """Time series opened during the current :meth:`append` (released at its end)."""
        self.name = name if name is not None else group.name.rsplit("/", 1)[-1]
        self.n_samples = 0
        """Rows appended so far (held in memory or written)."""
        self._file_rows = 0
        """Rows of every time series written to the file (the ``n_samples`` attribute)."""
        self._pending: list[tuple[np.ndarray, dict[str, tuple[np.ndarray, tuple[int, ...], dict[str, Any]]]]] = []
        """Blocks held in memory (a short case, :data:`SMALL_CASE_BYTES`): (times, blocks)."""
        self._pending_bytes = 0
        self._layout = "memory" if store.small_case_bytes > 0 else "chunked"
        """Where the time series go: ``memory`` (held until the case ends, then written
        whole, contiguous), ``whole`` (written so), ``chunked`` (appended to chunked,
        resizable, compressed datasets)."""
        self._whole: dict[str, tuple[tuple[int, ...], dict[str, Any]]] = {}
        """Row shape and attributes of the series written whole (layout ``whole``)."""
        self._whole_tried = False
        """A whole write was started (one stopped part-way may have left series behind)."""
        self._is_closed = False
        self._optional: set[str] | None = None
        self._sens_names: list[str] | None = None
        self._n_events = 0

    @property
    def group(self) -> h5py.Group:
        """The case group.  Samples still held in memory are written first, so that the
        group holds every sample appended so far (the runner's fits read them back)."""
        if not self._closed and self._pending:
            self._write_pending()
        return self._grp

    @property
    def _closed(self) -> bool:
        return self._is_closed

    @_closed.setter
    def _closed(self, value: bool) -> None:
        self._is_closed = bool(value)
        if value:
            self._datasets.clear()  # release the open datasets (their chunks are written)

    def _check_open(self) -> None:
        if self._closed or not self._grp.id.valid:
            raise RuntimeError(f"case {self.name!r}: writer is closed")

    def _series(self, path: str, row_shape: tuple[int, ...], attrs: Mapping[str, Any]) -> h5py.Dataset:
        got = self._datasets.get(path)
        if got is not None and got[0].id.valid:
            if got[1] != row_shape:
                raise ValueError(f"case {self.name!r}: {path} rows have shape {got[1]}, got {row_shape}")
            return got[0]
        ds = self._grp.get(path)
        if ds is None:
            parent_name, _, leaf = path.rpartition("/")
            parent = self._grp.require_group(parent_name) if parent_name else self._grp
            ds = self._store._create_series_with_attrs(parent, leaf, row_shape, attrs,
                                                       rows_hint=self._expected_rows)
        elif ds.shape[1:] != row_shape:
            raise ValueError(f"case {self.name!r}: {path} rows have shape {ds.shape[1:]}, got {row_shape}")
        self._datasets[path] = (ds, tuple(row_shape))
        return ds

    def append(self, times: np.ndarray, states_gcrf: np.ndarray, *, states_itrf: np.ndarray | None = None,
               elements: np.ndarray | None = None, accelerations: dict[str, np.ndarray] | None = None,
               stm: np.ndarray | None = None, sensitivity: np.ndarray | None = None,
               sensitivity_names: Sequence[str] | None = None) -> None:
        """Append a block of samples.

        Args:
            times: (m,) seconds since the case epoch, TT [s].
            states_gcrf: (m, 6) position [m] and velocity [m/s] in GCRF.
            states_itrf: optional (m, 6) the same in ITRF.
            elements: optional (m, 6) osculating a [m], e [-], i, RAAN, argument of
                perigee, true anomaly [rad].
            accelerations: optional {model name: (m, 3) acceleration [m/s^2] in GCRF}.
            stm: optional (m, 6, 6) state transition matrix d x(t) / d x(t0).
            sensitivity: optional (m, 6, ns) d x(t) / d p for the named parameters.
            sensitivity_names: the ns parameter names (required with ``sensitivity``).

        Where the rows go: while the case's series total at most
        ``StudyStore.small_case_bytes`` (and the announced ``expected_rows`` do not say
        more), blocks are held in memory (copied) and written whole when the case ends
        (:meth:`finish`, a stop, a failure, the file closing, or :attr:`group` /
        ``StudyStore.file`` being read); otherwise they are appended to chunked,
        resizable datasets (what was held is written first).
        """
        self._check_open()
        _check_termination()
        t = np.ascontiguousarray(times, dtype=np.float64).reshape(-1)
        m = t.shape[0]
        blocks: dict[str, tuple[np.ndarray, tuple[int, ...], dict[str, Any]]] = {}

        def take(key: str, arr: Any, row_shape: tuple[int, ...] | None, attrs: dict[str, Any]) -> None:
            a = np.ascontiguousarray(arr, dtype=np.float64)
            if row_shape is None:
                row_shape = a.shape[1:]
            if a.shape != (m, *row_shape):
                raise ValueError(f"case {self.name!r}: {key} has shape {a.shape}, expected {(m, *row_shape)}")
            blocks[key] = (a, row_shape, attrs)

        take("state_gcrf", states_gcrf, (6,), _GCRF_ATTRS)
        if states_itrf is not None:
            take("state_itrf", states_itrf, (6,), _ITRF_ATTRS)
        if elements is not None:
            take("elements_osculating", elements, (6,), _ELEMENT_ATTRS)
        for model, acc in (accelerations or {}).items():
            _check_case_name(model)
            take(f"acceleration/{model}", acc, (3,), _acceleration_attrs(model))
        if stm is not None:
            take("stm", stm, (6, 6), _STM_ATTRS)
        if sensitivity is not None:
            names = _str_list(sensitivity_names)
            sens = np.asarray(sensitivity)
            if sens.ndim != 3 or len(names) != sens.shape[2]:
                raise ValueError(f"case {self.name!r}: sensitivity of shape {sens.shape} needs "
                                 f"{sens.shape[-1] if sens.ndim == 3 else '?'} sensitivity_names, got {names}")
            if self._sens_names is not None and names != self._sens_names:
                raise ValueError(f"case {self.name!r}: sensitivity_names changed from {self._sens_names} to {names}")
            self._sens_names = names
            take("sensitivity", sens, (6, len(names)),
                 {"parameter_names": names,
                  "description": "d x(t) / d p for each parameter p (GCRF, x y z vx vy vz rows)",
                  "units": "SI per unit of each parameter"})
        elif sensitivity_names is not None:
            raise ValueError(f"case {self.name!r}: sensitivity_names given without sensitivity")

        optional = set(blocks) - {"state_gcrf"}
        if self._optional is None:
            if self.n_samples == 0:
                self._optional = optional
        if self._optional is not None and optional != self._optional:
            raise ValueError(f"case {self.name!r}: this block has {sorted(optional)} but earlier blocks "
                             f"had {sorted(self._optional)}; every block must carry the same quantities")
        if m == 0:
            return
        if not np.all(np.isfinite(t)):
            raise ValueError(f"case {self.name!r}: non-finite times")

        if self._layout == "memory":
            nbytes = t.nbytes + sum(a.nbytes for a, _, _ in blocks.values())
            limit = self._store.small_case_bytes
            if not self._pending and self._expected_rows is not None and \
                    nbytes * (max(self._expected_rows, m) / m) > limit:
                self._layout = "chunked"  # announced as too long to hold: stream from the start
            elif self._pending_bytes + nbytes <= limit:
                # held in memory (copies: the caller may reuse its arrays)
                self._pending.append((t.copy(), {k: (a.copy(), rs, at) for k, (a, rs, at) in blocks.items()}))
                self._pending_bytes += nbytes
                self.n_samples += m
                self._store._maybe_flush()
                return
            else:  # grew beyond the limit: what is held goes to chunked datasets, then stream
                self._layout = "chunked"
                self._write_pending()
        elif self._layout == "whole":  # appended to after a whole write: make them chunked
            self._rewrite_chunked()
        self._write_rows(t, blocks)
        self.n_samples += m
        self._store._maybe_flush()

    def _write_rows(self, t: np.ndarray, blocks: Mapping[str, tuple[np.ndarray, tuple[int, ...], dict]]) -> None:
        """Append rows to the chunked time series (created by the first block) from row
        ``_file_rows`` on, then update ``n_samples``."""
        n0 = self._file_rows
        _append_rows(self._series("time_s", (), _TIME_ATTRS), t, n0)
        for key, (arr, row_shape, attrs) in blocks.items():
            _append_rows(self._series(key, row_shape, attrs), arr, n0)
        self._file_rows = n0 + t.shape[0]
        _set_attrs(self._grp, {"n_samples": np.int64(self._file_rows)})
        # release the datasets: an open dataset's chunk cache fills up to
        # CHUNK_CACHE_BYTES with written chunks before evicting any (measured: +8 MB of
        # peak RSS over a 120-day LEO arc at 10 s with two series kept open), while a
        # closed one writes its chunks out and keeps nothing
        self._datasets.clear()

    def _write_pending(self, set_count: bool = True) -> None:
        """Write the blocks held in memory: whole (contiguous) datasets while the layout
        is ``memory`` (it becomes ``whole``), else appended to the chunked ones.
        ``set_count=False``: the caller writes the ``n_samples`` attribute itself."""
        pending = self._pending
        if not pending:
            return
        if len(pending) == 1:
            t, blocks = pending[0]
        else:
            t = np.concatenate([p[0] for p in pending])
            blocks = {k: (np.concatenate([p[1][k][0] for p in pending]), rs, at)
                      for k, (_, rs, at) in pending[0][1].items()}
        if self._layout != "memory":
            self._write_rows(t, blocks)
        else:
            g = self._grp
            store = self._store
            self._whole = {k: (rs, at) for k, (_, rs, at) in blocks.items()}
            retry = self._whole_tried  # a first write finds the fresh group of begin_case
            self._whole_tried = True
            for key, arr, attrs in (("time_s", t, _TIME_ATTRS),
                                    *((k, a, at) for k, (a, _, at) in blocks.items())):
                parent_name, _, leaf = key.rpartition("/")
                parent = g.require_group(parent_name) if parent_name else g
                if retry and parent.id.links.exists(leaf.encode("utf-8")):  # left by a write interrupted part-way
                    del parent[leaf]
                store._write_whole_series(parent, leaf, arr, attrs)
            self._file_rows = t.shape[0]
            if set_count:
                _set_attrs(g, {"n_samples": np.int64(self._file_rows)})
            self._layout = "whole"
        pending.clear()
        self._pending_bytes = 0

    def _rewrite_chunked(self) -> None:
        """Turn the whole (contiguous) time series into chunked, resizable ones (a block
        appended after they were written)."""
        g = self._grp
        t = g["time_s"][()]
        blocks = {k: (g[k][()], rs, at) for k, (rs, at) in self._whole.items()}
        for key in ("time_s", *blocks):
            del g[key]
        self._layout = "chunked"
        self._file_rows = 0
        self._write_rows(t, blocks)

    def add_events(self, times: np.ndarray, kinds: Sequence[str], states: np.ndarray) -> None:
        """Append events: times [s since epoch, TT], kind names, GCRF states (m, 6) [m, m/s].

        Stored as parallel datasets ``events/time_s``, ``events/kind``, ``events/state_gcrf``.
        """
        self._check_open()
        t = np.ascontiguousarray(times, dtype=np.float64).reshape(-1)
        kinds = [str(k) for k in kinds]
        st = np.ascontiguousarray(states, dtype=np.float64).reshape(-1, 6) if len(t) else np.zeros((0, 6))
        if len(kinds) != t.shape[0] or st.shape[0] != t.shape[0]:
            raise ValueError(f"case {self.name!r}: events need equal lengths (times {t.shape[0]}, "
                             f"kinds {len(kinds)}, states {st.shape[0]})")
        ev = self._grp.require_group("events")
        st_ = self._store
        if "time_s" not in ev:
            ds = st_._create_series(ev, "time_s", ())
            ds.attrs.update({"units": "s", "time_scale": "TT", "description": "event time since the case epoch"})
            ds = st_._create_series(ev, "kind", (), dtype=_STR)
            ds.attrs["description"] = "event kind name"
            ds = st_._create_series(ev, "state_gcrf", (6,))
            ds.attrs["frame"] = "GCRF"
            ds.attrs["columns"] = np.array(STATE_COLUMNS, dtype=_STR)
            ds.attrs["units"] = np.array(STATE_UNITS, dtype=_STR)
        _append_rows(ev["time_s"], t)
        _append_rows(ev["kind"], np.array(kinds, dtype=object))
        _append_rows(ev["state_gcrf"], st)
        self._n_events += t.shape[0]

    def _write_held(self) -> None:
        """Best effort before a case stops (interrupted, failed, file closed): write the
        samples held in memory, so that the file has every completed append."""
        if self._pending and self._grp.id.valid:
            try:
                self._write_pending()
            except Exception:  # the file refuses: the held samples are lost, the rest stays
                self._pending.clear()

    def _truncate_to_committed(self) -> None:
        """Write the samples held in memory, then cut every time-indexed dataset to the
        rows of completed appends (``n_samples``) and the events to the rows of completed
        :meth:`add_events` calls (rows of an append interrupted part-way are dropped, so
        all series keep one length)."""
        self._write_held()
        g = self._grp
        n = self._file_rows
        g.attrs["n_samples"] = np.int64(n)
        for key in ("time_s", "state_gcrf", "state_itrf", "elements_osculating", "stm", "sensitivity"):
            ds = g.get(key)
            if isinstance(ds, h5py.Dataset) and ds.shape[0] > n and ds.chunks is not None:
                ds.resize(n, axis=0)
        acc = g.get("acceleration")
        for ds in (acc.values() if isinstance(acc, h5py.Group) else ()):
            if isinstance(ds, h5py.Dataset) and ds.shape[0] > n and ds.chunks is not None:
                ds.resize(n, axis=0)
        ev = g.get("events")
        for ds in (ev.values() if isinstance(ev, h5py.Group) else ()):
            if isinstance(ds, h5py.Dataset) and ds.shape[0] > self._n_events:
                ds.resize(self._n_events, axis=0)

    def add_fit(self, fit_name: str, values: dict[str, float], residuals_ric: np.ndarray | None = None,
                residual_times: np.ndarray | None = None, table: dict[str, np.ndarray] | None = None,
                attrs: dict | None = None) -> None:
        """Store an element fit under ``fits/<fit_name>`` (replaced if present).

        Args:
            fit_name: e.g. "osculating", "broadcast_style".
            values: element (or parameter) name -> value in SI units (stored as the
                parallel datasets ``element_names`` / ``element_values``).
            residuals_ric: optional (m, 3) residual position fit - trajectory in the
                radial / in-track / cross-track frame [m].
            residual_times: (m,) seconds since the case epoch, TT [s] (required with
                ``residuals_ric``).
            table: optional column name -> 1-D array (e.g. an RMS table), stored in
                ``fits/<fit_name>/table/<column>``; string columns are allowed.
            attrs: optional attributes (units, reference epoch, ...).
        """
        self._check_open()
        _check_case_name(fit_name)
        fits = self._grp.require_group("fits")
        if fit_name in fits:
            del fits[fit_name]
        g = fits.create_group(fit_name)
        names = list(values)
        g.create_dataset("element_names", data=np.array(names, dtype=object), dtype=_STR)
        g.create_dataset("element_values", data=np.array([float(values[k]) for k in names], dtype=np.float64))
        if residuals_ric is not None:
            ric = np.ascontiguousarray(residuals_ric, dtype=np.float64)
            if residual_times is None:
                raise ValueError(f"fit {fit_name!r}: residual_times are required with residuals_ric")
            rt = np.ascontiguousarray(residual_times, dtype=np.float64).reshape(-1)
            if ric.shape != (rt.shape[0], 3):
                raise ValueError(f"fit {fit_name!r}: residuals_ric has shape {ric.shape}, expected {(rt.shape[0], 3)}")
            ds = self._store._create_series(g, "residual_time_s", ())
            _append_rows(ds, rt)
            ds.attrs.update({"units": "s", "time_scale": "TT"})
            ds = self._store._create_series(g, "residual_ric", (3,))
            _append_rows(ds, ric)
            ds.attrs["units"] = "m"
            ds.attrs["columns"] = np.array(RIC_COLUMNS, dtype=_STR)
            ds.attrs["description"] = "fitted minus propagated position, radial / in-track / cross-track"
        elif residual_times is not None:
            raise ValueError(f"fit {fit_name!r}: residual_times given without residuals_ric")
        if table:
            tg = g.create_group("table")
            tg.attrs["columns"] = np.array(list(table), dtype=_STR)
            for col, vals in table.items():
                _check_case_name(col)
                arr = np.asarray(vals)
                if arr.dtype.kind in "USO":
                    tg.create_dataset(col, data=np.array([str(v) for v in arr.reshape(-1)], dtype=object), dtype=_STR)
                else:
                    tg.create_dataset(col, data=arr)
        _set_attrs(g, dict(attrs or {}), new=True)

    def finish(self, statistics: dict, status: str = STATUS_COMPLETE) -> None:
        """Write the integrator statistics, set the status (default ``"complete"``) and flush.

        ``statistics`` (e.g. nfev, accepted, rejected, min_step_s, max_step_s, status,
        message) become attributes of the subgroup ``integrator_statistics``.
        """
        self._check_open()
        if status not in _STATUSES:
            raise ValueError(f"status must be one of {_STATUSES}, got {status!r}")
        stats = {str(k): v for k, v in (statistics or {}).items()}
        self._write_pending(set_count=False)
        if not self._grp.id.links.exists(b"integrator_statistics"):
            _create_group_with_attrs(self._grp, "integrator_statistics", stats)
        else:
            _set_attrs(self._grp["integrator_statistics"], stats)
        # begin_case made these three from plain values of the same types
        _overwrite_plain_attrs(self._grp, {"n_samples": int(self._file_rows), "finished_utc": _utc_now(),
                                           "status": status})
        self._closed = True
        self._store._writers.pop(self.name, None)
        self._store.flush()                 # a completed case is durable at once


# --------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------
def _read_ds(grp: h5py.Group, name: str) -> np.ndarray | None:
    ds = grp.get(name)
    return None if ds is None else ds[()]


def _read_strings(ds: h5py.Dataset | None) -> list[str]:
    if ds is None:
        return []
    return [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in ds[()].tolist()]


def _json_attr(attrs: Mapping[str, Any], key: str, default: Any) -> Any:
    text = attrs.get(key)
    if not text:
        return default
    try:
        return json.loads(text)
    except (TypeError, ValueError):
        return default


def read_case(path: str | os.PathLike, name: str) -> dict[str, Any]:
    """Load one case whole (arrays + attributes); for tests, plots and exports of short arcs.

    Returns a dict with keys ``name``, ``attrs`` (all case attributes), ``status``,
    ``epoch`` (``{"iso", "jd1", "jd2", "scale"}``), ``time_s``, ``state_gcrf``,
    ``state_itrf``, ``elements_osculating``, ``stm``, ``sensitivity`` (None when absent),
    ``sensitivity_names``, ``accelerations`` ({model: array}), ``events`` (None or
    ``{"time_s", "kind", "state_gcrf"}``), ``fits`` ({fit: {"values", "residual_time_s",
    "residual_ric", "table", "attrs"}}), ``integrator_statistics``, ``force_models``,
    ``constants`` and ``case_config_toml``.  Use :func:`iter_case_rows` for long arcs.
    """
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or name not in cases:
            raise KeyError(f"{path}: no case {name!r}")
        g = cases[name]
        attrs = _read_attrs(g)
        out: dict[str, Any] = {
            "name": name,
            "attrs": attrs,
            "status": attrs.get("status"),
            "epoch": {"iso": attrs.get("epoch_iso"), "jd1": attrs.get("epoch_jd1"),
                      "jd2": attrs.get("epoch_jd2"), "scale": attrs.get("epoch_scale")},
            "time_s": _read_ds(g, "time_s"),
            "state_gcrf": _read_ds(g, "state_gcrf"),
            "state_itrf": _read_ds(g, "state_itrf"),
            "elements_osculating": _read_ds(g, "elements_osculating"),
            "stm": _read_ds(g, "stm"),
            "sensitivity": _read_ds(g, "sensitivity"),
            "sensitivity_names": _str_list(g["sensitivity"].attrs.get("parameter_names")) if "sensitivity" in g else [],
            "accelerations": {k: v[()] for k, v in g["acceleration"].items()} if "acceleration" in g else {},
            "events": None,
            "fits": {},
            "integrator_statistics": _read_attrs(g["integrator_statistics"]) if "integrator_statistics" in g else {},
            "force_models": _json_attr(attrs, "force_models_json", []),
            "constants": _json_attr(attrs, "constants_json", {}),
            "case_config_toml": attrs.get("case_config_toml", ""),
        }
        if "events" in g:
            ev = g["events"]
            out["events"] = {"time_s": ev["time_s"][()], "kind": _read_strings(ev["kind"]),
                             "state_gcrf": ev["state_gcrf"][()]}
        for fit_name, fg in (g["fits"].items() if "fits" in g else []):
            names = _read_strings(fg["element_names"])
            vals = fg["element_values"][()]
            table: dict[str, Any] = {}
            if "table" in fg:
                tg = fg["table"]
                for col in _str_list(tg.attrs.get("columns")) or list(tg.keys()):
                    ds = tg[col]
                    table[col] = _read_strings(ds) if h5py.check_string_dtype(ds.dtype) else ds[()]
            out["fits"][fit_name] = {
                "values": dict(zip(names, (float(v) for v in vals))),
                "residual_time_s": _read_ds(fg, "residual_time_s"),
                "residual_ric": _read_ds(fg, "residual_ric"),
                "table": table,
                "attrs": _read_attrs(fg),
            }
    return out


def iter_case_rows(path: str | os.PathLike, name: str, fields: Sequence[str] = ("time_s", "state_gcrf"),
                   block_rows: int = 65536, reverse: bool = False) -> Iterator[dict[str, np.ndarray]]:
    """Yield consecutive blocks ``{field: array}`` of a case's time series without
    loading the whole arc (``fields`` are dataset paths inside the case group, e.g.
    ``"state_itrf"`` or ``"acceleration/srp"``).  ``reverse`` yields the blocks from the
    end, each block reversed (chronological order for a backward propagation)."""
    with open_for_reading(path) as f:
        g = f[CASES_GROUP][name]
        missing = [k for k in fields if k not in g]
        if missing:
            raise KeyError(f"case {name!r} has no dataset(s) {missing}")
        dsets = [g[k] for k in fields]
        n = min(ds.shape[0] for ds in dsets)
        starts = range(0, n, block_rows)
        if reverse:
            starts = reversed(starts)
        for i0 in starts:
            i1 = min(n, i0 + block_rows)
            block = {k: ds[i0:i1] for k, ds in zip(fields, dsets)}
            if reverse:
                block = {k: v[::-1] for k, v in block.items()}
            yield block


def mark_unfinished_as_interrupted(path: str | os.PathLike) -> list[str]:
    """Set status ``"interrupted"`` on every case still marked ``"running"`` (left by a
    process that ended mid-case) and return their names.  Do not call it while a writer
    has the file open."""
    names: list[str] = []
    with h5py.File(path, "a") as f:
        cases = f.get(CASES_GROUP)
        if cases is None:
            return names
        for name in sorted(cases):
            g = cases[name]
            status = g.attrs.get("status")
            if isinstance(status, bytes):
                status = status.decode()
            if status == STATUS_RUNNING:
                _label_interrupted(g, "the process writing this case ended before the case finished "
                                      f"(found running at {_utc_now()})")
                names.append(name)
        f.flush()
    return names
