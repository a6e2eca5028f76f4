"""Export a stored case as a CCSDS Orbit Ephemeris Message (OEM, KVN text) and read OEM text.

Format: CCSDS 502.0-B-2 "Orbit Data Messages" (Blue Book, November 2009), section 5 (OEM),
Keyword = Value Notation; version 3.0 of the message (CCSDS 502.0-B-3, April 2023) keeps
the same KVN layout for the keywords written here.  One segment:

    CCSDS_OEM_VERS = 2.0
    CREATION_DATE  = <UTC>
    ORIGINATOR     = <text>
    META_START
    OBJECT_NAME / OBJECT_ID / CENTER_NAME = EARTH / REF_FRAME / TIME_SYSTEM /
    START_TIME / STOP_TIME
    META_STOP
    <epoch> X Y Z X_DOT Y_DOT Z_DOT        (km, km/s)

Epochs are ``YYYY-MM-DDThh:mm:ss.d...`` in the message's TIME_SYSTEM (UTC, TAI or TT);
UTC epochs inside a leap second print as ``23:59:60.x`` (formatted by ``erfa.d2dtf``).
The stored times are seconds since the case epoch in TT; conversion to UTC uses
`propagator.timescales.convert_jd` (IERS leap-second table).

The export streams the case in blocks (a year-long arc never has to be in memory whole)
and writes the samples in chronological order, also for a backward propagation.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import os
import re
import warnings
from pathlib import Path
from typing import Any, Iterable, Iterator, TextIO

import erfa
import numpy as np

from propagator.constants import SECONDS_PER_DAY
from propagator.study.hdf5_store import CASES_GROUP, iter_case_rows, open_for_reading, software_version
from propagator.timescales import Epoch, convert_jd

__all__ = ["OEM_TIME_SYSTEMS", "write_oem", "case_to_oem_text", "read_oem", "oem_epoch_to_jd",
           "format_epochs"]

OEM_TIME_SYSTEMS = ("UTC", "TAI", "TT")
"""TIME_SYSTEM values this exporter writes (CCSDS 502.0-B-2 Annex A lists more)."""

_FRAME_DATASET = {"GCRF": "state_gcrf", "ITRF": "state_itrf"}


@contextlib.contextmanager
def _quiet_dubious_year() -> Iterator[None]:
    """Silence only ERFA's "dubious year" warning for UTC dates past its release + 5 years:
    `propagator.timescales` installs the IERS leap-second table and logs its own
    warning past the table's expiry (see `propagator.timescales._quiet_dubious_year`)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*dubious year.*", category=erfa.ErfaWarning)
        yield


def format_epochs(epoch_tt: Epoch, t: np.ndarray, time_system: str, decimals: int = 6) -> list[str]:
    """Calendar text ``YYYY-MM-DDThh:mm:ss.fff`` of ``epoch_tt + t`` in ``time_system``.

    ``t`` are seconds since ``epoch_tt`` (TT).  Whole days are split off before the day
    fraction is formed, so the two-part JD keeps sub-nanosecond resolution over years.
    Rounding to ``decimals`` and the carry into minutes/days (and the 61st second of a
    UTC leap-second day) are done by ``erfa.d2dtf`` (SOFA ``iauD2dtf``).
    """
    if time_system not in OEM_TIME_SYSTEMS:
        raise ValueError(f"time_system must be one of {OEM_TIME_SYSTEMS}, got {time_system!r}")
    if epoch_tt.scale != "TT":
        raise ValueError("format_epochs needs the case epoch in TT")
    t = np.asarray(t, dtype=np.float64).reshape(-1)
    if t.size == 0:
        return []
    days = np.floor(t / SECONDS_PER_DAY)
    frac = (t - days * SECONDS_PER_DAY) / SECONDS_PER_DAY
    j1, j2 = convert_jd(epoch_tt.jd1 + days, epoch_tt.jd2 + frac, "TT", time_system)
    with _quiet_dubious_year():
        iy, im, iday, ihmsf = erfa.d2dtf(time_system, decimals, j1, j2)
    h, mi, s, f = ihmsf["h"], ihmsf["m"], ihmsf["s"], ihmsf["f"]
    if decimals > 0:
        return [f"{a:04d}-{b:02d}-{c:02d}T{d:02d}:{e:02d}:{g:02d}.{k:0{decimals}d}"
                for a, b, c, d, e, g, k in zip(iy.tolist(), im.tolist(), iday.tolist(), h.tolist(),
                                                mi.tolist(), s.tolist(), f.tolist())]
    return [f"{a:04d}-{b:02d}-{c:02d}T{d:02d}:{e:02d}:{g:02d}"
            for a, b, c, d, e, g in zip(iy.tolist(), im.tolist(), iday.tolist(), h.tolist(),
                                        mi.tolist(), s.tolist())]


def _case_info(path: str | os.PathLike, case: str, dataset: str) -> tuple[Epoch, int, float, float, dict]:
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or case not in cases:
            raise KeyError(f"{path}: no case {case!r}")
        g = cases[case]
        attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in g.attrs.items()}
        if dataset not in g:
            raise ValueError(f"case {case!r} has no {dataset!r} dataset (the study did not store "
                             f"that frame); export REF_FRAME=GCRF or store the ITRF states")
        t = g["time_s"]
        n = int(t.shape[0])
        if n == 0:
            raise ValueError(f"case {case!r} holds no samples")
        t0, t1 = float(t[0]), float(t[n - 1])
    epoch = Epoch.from_jd(float(attrs["epoch_jd1"]), float(attrs["epoch_jd2"]), str(attrs["epoch_scale"]))
    return epoch.to("TT"), n, t0, t1, attrs


def _oem_lines(path: str | os.PathLike, case: str, *, ref_frame: str, time_system: str,
               object_name: str | None, object_id: str | None, originator: str, version: str,
               position_decimals: int, velocity_decimals: int, epoch_decimals: int,
               block_rows: int, comments: Iterable[str] | None, ref_frame_label: str | None) -> Iterator[str]:
    ref_frame = ref_frame.upper()
    if ref_frame not in _FRAME_DATASET:
        raise ValueError(f"ref_frame must be 'GCRF' or 'ITRF', got {ref_frame!r}")
    time_system = time_system.upper()
    if time_system not in OEM_TIME_SYSTEMS:
        raise ValueError(f"time_system must be one of {OEM_TIME_SYSTEMS}, got {time_system!r}")
    if version not in ("2.0", "3.0"):
        raise ValueError(f"version must be '2.0' or '3.0', got {version!r}")
    dataset = _FRAME_DATASET[ref_frame]
    epoch_tt, n, t0, t1, attrs = _case_info(path, case, dataset)
    backward = t1 < t0
    first, last = format_epochs(epoch_tt, np.array([min(t0, t1), max(t0, t1)]), time_system, epoch_decimals)

    created = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S")
    yield f"CCSDS_OEM_VERS = {version}"
    yield f"COMMENT Written by longarc {software_version()} from study case {case}"
    yield f"COMMENT Case epoch {attrs.get('epoch_iso', '')}; states from dataset {dataset}"
    for c in comments or []:
        for line in str(c).splitlines():
            yield f"COMMENT {line}"
    yield f"CREATION_DATE = {created}"
    yield f"ORIGINATOR = {originator}"
    yield ""
    yield "META_START"
    yield f"OBJECT_NAME = {object_name or attrs.get('object_name') or case}"
    yield f"OBJECT_ID = {object_id or attrs.get('object_id') or case}"
    yield "CENTER_NAME = EARTH"
    yield f"REF_FRAME = {ref_frame_label or ref_frame}"
    yield f"TIME_SYSTEM = {time_system}"
    yield f"START_TIME = {first}"
    yield f"STOP_TIME = {last}"
    yield "META_STOP"
    yield ""
    pfmt = f"{{:.{position_decimals}f}}"
    vfmt = f"{{:.{velocity_decimals}f}}"
    for block in iter_case_rows(path, case, ("time_s", dataset), block_rows=block_rows, reverse=backward):
        stamps = format_epochs(epoch_tt, block["time_s"], time_system, epoch_decimals)
        km = block[dataset] * 1e-3  # m -> km, m/s -> km/s
        for stamp, row in zip(stamps, km.tolist()):
            yield " ".join([stamp, pfmt.format(row[0]), pfmt.format(row[1]), pfmt.format(row[2]),
                            vfmt.format(row[3]), vfmt.format(row[4]), vfmt.format(row[5])])


def write_oem(path: str | os.PathLike, case: str, out_path: str | os.PathLike, *, ref_frame: str = "GCRF",
              time_system: str = "UTC", object_name: str | None = None, object_id: str | None = None,
              originator: str = "longarc", version: str = "2.0", position_decimals: int = 9,
              velocity_decimals: int = 12, epoch_decimals: int = 6, block_rows: int = 65536,
              comments: Iterable[str] | None = None, ref_frame_label: str | None = None) -> Path:
    """Write case ``case`` of study file ``path`` as an OEM (KVN) file; returns ``out_path``.

    Args:
        ref_frame: ``"GCRF"`` (dataset ``state_gcrf``) or ``"ITRF"`` (dataset
            ``state_itrf``, which the study must have stored).
        time_system: TIME_SYSTEM of the epochs: ``"UTC"`` (default), ``"TAI"`` or ``"TT"``.
        object_name, object_id: default to the case attributes ``object_name`` /
            ``object_id`` if present, else the case name.
        version: CCSDS_OEM_VERS, ``"2.0"`` or ``"3.0"``.
        position_decimals, velocity_decimals: decimals of km and km/s (defaults 9 and
            12: 1 um and 1 nm/s).
        epoch_decimals: decimals of the seconds of each epoch (default 6: 1 us).
        ref_frame_label: text written as REF_FRAME (e.g. a specific ITRF realisation);
            defaults to ``ref_frame``.
    """
    out_path = Path(out_path)
    lines = _oem_lines(path, case, ref_frame=ref_frame, time_system=time_system, object_name=object_name,
                       object_id=object_id, originator=originator, version=version,
                       position_decimals=position_decimals, velocity_decimals=velocity_decimals,
                       epoch_decimals=epoch_decimals, block_rows=block_rows, comments=comments,
                       ref_frame_label=ref_frame_label)
    tmp = out_path.with_name(out_path.name + ".part")
    with open(tmp, "w", encoding="ascii", newline="\n") as fh:
        _write_lines(fh, lines)
    os.replace(tmp, out_path)
    return out_path


def _write_lines(fh: TextIO, lines: Iterable[str]) -> None:
    buf: list[str] = []
    for line in lines:
        buf.append(line)
        if len(buf) >= 8192:
            fh.write("\n".join(buf) + "\n")
            buf.clear()
    if buf:
        fh.write("\n".join(buf) + "\n")


def case_to_oem_text(path: str | os.PathLike, case: str, **kwargs: Any) -> str:
    """The OEM text of a case as one string (for short arcs; see :func:`write_oem`)."""
    kwargs.setdefault("ref_frame", "GCRF")
    kwargs.setdefault("time_system", "UTC")
    defaults = dict(object_name=None, object_id=None, originator="longarc", version="2.0",
                    position_decimals=9, velocity_decimals=12, epoch_decimals=6, block_rows=65536,
                    comments=None, ref_frame_label=None)
    defaults.update(kwargs)
    return "\n".join(_oem_lines(path, case, **defaults)) + "\n"


# --------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------
_EPOCH_RE = re.compile(
    r"^(?P<y>\d{4})-(?:(?P<mo>\d{2})-(?P<d>\d{2})|(?P<doy>\d{3}))T(?P<h>\d{2}):(?P<mi>\d{2}):(?P<s>\d{2}(?:\.\d*)?)Z?$")


def _split_epoch(text: str) -> tuple[int, int, int, int, int, float]:
    m = _EPOCH_RE.match(text.strip())
    if m is None:
        raise ValueError(f"not a CCSDS epoch: {text!r} (expected YYYY-MM-DDThh:mm:ss[.d] or YYYY-DDDThh:mm:ss[.d])")
    y = int(m["y"])
    if m["doy"] is not None:
        date = _dt.date(y, 1, 1) + _dt.timedelta(days=int(m["doy"]) - 1)
        mo, d = date.month, date.day
    else:
        mo, d = int(m["mo"]), int(m["d"])
    return y, mo, d, int(m["h"]), int(m["mi"]), float(m["s"])


def oem_epoch_to_jd(texts: Iterable[str], time_system: str) -> tuple[np.ndarray, np.ndarray]:
    """Two-part Julian dates of OEM epoch strings in their TIME_SYSTEM (``erfa.dtf2d``;
    UTC leap-second days use ERFA's quasi-JD convention)."""
    parts = [_split_epoch(t) for t in texts]
    if not parts:
        return np.zeros(0), np.zeros(0)
    cols = list(zip(*parts))
    scale = time_system.upper()
    with _quiet_dubious_year():
        return erfa.dtf2d(scale, np.array(cols[0]), np.array(cols[1]), np.array(cols[2]), np.array(cols[3]),
                          np.array(cols[4]), np.array(cols[5], dtype=np.float64))


def read_oem(text: str) -> dict[str, Any]:
    """Parse OEM KVN text (CCSDS 502.0-B-2 section 5.2).

    Returns ``{"header": {keyword: value}, "comments": [...], "segments": [segment]}``
    with each segment ``{"metadata": {keyword: value}, "comments": [...], "epochs":
    [str], "states": (n, 6) array [km, km/s], "accelerations": (n, 3) array [km/s^2]
    or None, "covariance_lines": [str]}``.  For a one-segment message the keys
    ``metadata``, ``epochs`` and ``states`` of that segment are also given at the top level.
    """
    header: dict[str, str] = {}
    comments: list[str] = []
    segments: list[dict[str, Any]] = []
    seg: dict[str, Any] | None = None
    rows: list[list[float]] = []
    where = "header"

    def close_segment() -> None:
        if seg is None:
            return
        arr = np.array(rows, dtype=np.float64) if rows else np.zeros((0, 6))
        widths = {len(r) for r in rows}
        if len(widths) > 1:
            raise ValueError("OEM data lines of one segment have different numbers of values")
        seg["states"] = arr[:, :6] if arr.size else np.zeros((0, 6))
        seg["accelerations"] = arr[:, 6:9] if arr.size and arr.shape[1] == 9 else None
        segments.append(seg)

    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("COMMENT"):
            target = comments if where == "header" else seg["comments"]  # type: ignore[index]
            target.append(line[7:].strip())
            continue
        if line == "META_START":
            close_segment()
            seg = {"metadata": {}, "comments": [], "epochs": [], "covariance_lines": []}
            rows = []
            where = "meta"
            continue
        if line == "META_STOP":
            if where != "meta":
                raise ValueError(f"line {lineno}: META_STOP without META_START")
            where = "data"
            continue
        if line == "COVARIANCE_START":
            where = "covariance"
            continue
        if line == "COVARIANCE_STOP":
            where = "data"
            continue
        if where == "covariance":
            seg["covariance_lines"].append(line)  # type: ignore[index]
            continue
        if "=" in line and where in ("header", "meta"):
            key, _, value = line.partition("=")
            (header if where == "header" else seg["metadata"])[key.strip()] = value.strip()  # type: ignore[index]
            continue
        if where == "data":
            fields = line.split()
            if len(fields) not in (7, 10):
                raise ValueError(f"line {lineno}: an OEM data line has an epoch and 6 (or 9) values: {raw!r}")
            _split_epoch(fields[0])  # validates the epoch text
            seg["epochs"].append(fields[0])  # type: ignore[index]
            rows.append([float(v) for v in fields[1:]])
            continue
        raise ValueError(f"line {lineno}: unexpected text in the {where} section: {raw!r}")
    close_segment()
    if "CCSDS_OEM_VERS" not in header:
        raise ValueError("not an OEM: no CCSDS_OEM_VERS line")
    out: dict[str, Any] = {"header": header, "comments": comments, "segments": segments}
    if len(segments) == 1:
        out.update(metadata=segments[0]["metadata"], epochs=segments[0]["epochs"], states=segments[0]["states"])
    return out
