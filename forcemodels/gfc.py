"""Reader for static gravity-field models in the ICGEM ``.gfc`` format.

Format: F. Barthelmes and C. Foerste, "The ICGEM-format", GFZ Potsdam (versions of
2006-02-28 and 2011-06-07).  A file is a free-text header with keyword lines, a line
starting with ``end_of_head``, then one coefficient row per (degree L, order M)::

    gfc  L  M  C  S  [sigmaC  sigmaS]

Header keywords read here: ``product_type``, ``modelname`` (or ``product_name``),
``earth_gravity_constant`` [m^3/s^2] (``gravity_constant`` is also accepted: ICGEM's
models of other celestial bodies use it), ``radius`` [m], ``max_degree``, ``norm``
(``fully_normalized`` = default, or ``unnormalized``), ``tide_system`` and ``errors``.
Other header lines (comments, the column caption ``key L M C S ...``) are ignored.
Numbers may use Fortran ``D`` exponents (``0.1D-05``).

Policy:

* Only static models are read.  Time-variable rows (``gfct``, ``trnd``/``dot``,
  ``acos``, ``asin`` of the icgem1.0/2.0 formats) are refused with a clear error:
  ignoring them would silently drop part of the field.
* Missing (L, M) rows are zero (many files have no degree-1 rows).  Duplicate rows are
  an error.
* Unnormalised files (``norm unnormalized``) are converted to fully normalised
  coefficients: C_bar = C / N_LM with N_LM = sqrt((2 - delta_0M)(2L+1)(L-M)!/(L+M)!)
  (Heiskanen & Moritz, Physical Geodesy, 1967, eq. 1-73; geodesy 4-pi normalisation,
  no Condon-Shortley phase).  ``GravityField.norm`` is then ``fully_normalized`` and
  ``norm_in_file`` keeps ``unnormalized``.
* The tide system is reported, never converted.

Every error raises :class:`GfcError` (a ``ValueError``) naming the file and, for row
problems, the 1-based line number.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

_TIME_VARIABLE_KEYS = ("gfct", "trnd", "dot", "acos", "asin")
_DATA_DIR = Path(__file__).resolve().parent / "data"
DEFAULT_FIELD_FILE = _DATA_DIR / "EGM96_deg8.gfc"
"""Small default field shipped with the package (EGM96 to degree/order 8, see data/README.md)."""


class GfcError(ValueError):
    """A ``.gfc`` file could not be read; the message names the file (and line)."""


@dataclass(frozen=True)
class GravityField:
    """A static spherical-harmonic gravity field, fully normalised (geodesy 4-pi convention).

    Attributes:
        name: model name from the header (``modelname``), or the file stem.
        gm: gravitational parameter the coefficients refer to [m^3/s^2].
        radius: reference radius [m].
        max_degree: highest degree held in ``C``/``S`` (the requested truncation, or the
            file's ``max_degree``).
        tide_system: ``tide_free``, ``zero_tide``, ``mean_tide`` or ``unknown``.
        norm: normalisation of ``C``/``S`` as stored here: always ``fully_normalized``.
        C, S: (max_degree+1, max_degree+1) arrays, ``C[L, M]``; entries with M > L are 0.
        sigma_c, sigma_s: the error columns (zeros when the file has none).
        source_path: the file read.
        norm_in_file: ``fully_normalized`` or ``unnormalized`` (converted on reading).
        errors: the header's ``errors`` keyword (``no``, ``formal``, ``calibrated``, ...).
        file_max_degree: the ``max_degree`` stated in the file header.
    """

    name: str
    gm: float
    radius: float
    max_degree: int
    tide_system: str
    norm: str
    C: np.ndarray
    S: np.ndarray
    sigma_c: np.ndarray
    sigma_s: np.ndarray
    source_path: Path
    norm_in_file: str = "fully_normalized"
    errors: str = "no"
    file_max_degree: int = 0

    def j2(self) -> float:
        """Unnormalised J2 = -sqrt(5) C_bar_20 [-] (J_n = -C_n0 unnormalised and
        C_n0 = sqrt(2n+1) C_bar_n0; Heiskanen & Moritz, Physical Geodesy, 1967, sec. 2-9 and
        eq. 1-73)."""
        return -math.sqrt(5.0) * float(self.C[2, 0])


def _number(token: str) -> float:
    """Parse a float that may use a Fortran ``D`` exponent."""
    return float(token.replace("D", "e").replace("d", "e"))


def normalisation_factor(n: int, m: int) -> float:
    """N_nm = sqrt((2 - delta_0m)(2n+1)(n-m)!/(n+m)!) (Heiskanen & Moritz 1967, eq. 1-73).

    Computed through log-gamma so that it stays finite for large degrees.
    """
    log_n = 0.5 * (math.log((2.0 - (m == 0)) * (2 * n + 1)) + math.lgamma(n - m + 1) - math.lgamma(n + m + 1))
    return math.exp(log_n)


def read_gfc(path: str | Path, max_degree: int | None = None) -> GravityField:
    """Read a static ICGEM ``.gfc`` file, optionally truncated to ``max_degree``.

    Args:
        path: file to read.
        max_degree: keep degrees 0..max_degree (all orders); ``None`` = the file's
            ``max_degree``.  Asking for more than the file holds is an error.

    Returns:
        :class:`GravityField` with fully normalised coefficients.

    Raises:
        GfcError: missing file, no ``end_of_head``, missing GM or radius, malformed or
            duplicate row (with its line number), time-variable rows, degree above the
            file's maximum (both numbers in the message).
    """
    path = Path(path).expanduser()
    if not path.is_file():
        raise GfcError(f"gravity-field file {path}: no such file")
    try:
        lines = path.read_text(encoding="utf-8", errors="replace").splitlines()
    except OSError as exc:
        raise GfcError(f"gravity-field file {path}: cannot read it ({exc})") from None

    header: dict[str, tuple[str, int]] = {}
    data_start = None
    for i, raw in enumerate(lines):
        tokens = raw.split()
        if not tokens:
            continue
        key = tokens[0].lower()
        if key.startswith("end_of_head"):
            data_start = i + 1
            break
        if len(tokens) >= 2 and key not in header:
            header[key] = (tokens[1], i + 1)
    if data_start is None:
        raise GfcError(f"gravity-field file {path}: no 'end_of_head' line; is this an ICGEM .gfc file?")

    def header_float(*keys: str) -> float | None:
        for k in keys:
            if k in header:
                tok, ln = header[k]
                try:
                    return _number(tok)
                except ValueError:
                    raise GfcError(f"gravity-field file {path}, line {ln}: {k} value {tok!r} is not a number") from None
        return None

    gm = header_float("earth_gravity_constant", "gravity_constant")
    radius = header_float("radius")
    if gm is None:
        raise GfcError(f"gravity-field file {path}: header has no 'earth_gravity_constant' (GM)")
    if radius is None:
        raise GfcError(f"gravity-field file {path}: header has no 'radius'")
    if not (gm > 0.0 and radius > 0.0):
        raise GfcError(f"gravity-field file {path}: GM ({gm}) and radius ({radius}) must be positive")

    file_max = header_float("max_degree")
    if file_max is None or file_max != int(file_max) or file_max < 0:
        raise GfcError(f"gravity-field file {path}: header has no valid 'max_degree'")
    file_max = int(file_max)
    if max_degree is None:
        nmax = file_max
    else:
        if max_degree < 0:
            raise GfcError(f"gravity-field file {path}: requested degree {max_degree} is negative")
        if max_degree > file_max:
            raise GfcError(f"gravity-field file {path}: requested degree {max_degree} is above the "
                           f"file's max_degree {file_max}")
        nmax = int(max_degree)

    norm_in_file = header.get("norm", ("fully_normalized", 0))[0].lower()
    if norm_in_file not in ("fully_normalized", "unnormalized"):
        raise GfcError(f"gravity-field file {path}, line {header['norm'][1]}: unknown norm {norm_in_file!r} "
                       "(expected 'fully_normalized' or 'unnormalized')")
    tide_system = header.get("tide_system", ("unknown", 0))[0].lower()
    errors = header.get("errors", ("no", 0))[0].lower()
    name = header.get("modelname", header.get("product_name", (path.stem, 0)))[0]

    C = np.zeros((nmax + 1, nmax + 1))
    S = np.zeros((nmax + 1, nmax + 1))
    sig_c = np.zeros((nmax + 1, nmax + 1))
    sig_s = np.zeros((nmax + 1, nmax + 1))
    seen: dict[tuple[int, int], int] = {}
    n_rows = 0
    for i in range(data_start, len(lines)):
        tokens = lines[i].split()
        if not tokens:
            continue
        lineno = i + 1
        key = tokens[0].lower()
        if key in _TIME_VARIABLE_KEYS:
            raise GfcError(f"gravity-field file {path}, line {lineno}: time-variable row {tokens[0]!r}; "
                           "only static models (rows 'gfc') are supported")
        if key != "gfc":
            raise GfcError(f"gravity-field file {path}, line {lineno}: unknown row key {tokens[0]!r} "
                           "(expected 'gfc')")
        if len(tokens) < 5:
            raise GfcError(f"gravity-field file {path}, line {lineno}: malformed row, expected "
                           f"'gfc L M C S [sigmaC sigmaS]', got {lines[i].strip()!r}")
        try:
            n = int(tokens[1])
            m = int(tokens[2])
            values = [_number(t) for t in tokens[3:7]]
        except ValueError:
            raise GfcError(f"gravity-field file {path}, line {lineno}: malformed row (not numbers): "
                           f"{lines[i].strip()!r}") from None
        if not all(math.isfinite(x) for x in values):
            raise GfcError(f"gravity-field file {path}, line {lineno}: non-finite coefficient")
        if n < 0 or m < 0 or m > n:
            raise GfcError(f"gravity-field file {path}, line {lineno}: invalid degree/order L={n}, M={m}")
        if n > file_max:
            raise GfcError(f"gravity-field file {path}, line {lineno}: degree {n} is above the header's "
                           f"max_degree {file_max}")
        if (n, m) in seen:
            raise GfcError(f"gravity-field file {path}, line {lineno}: duplicate row L={n}, M={m} "
                           f"(first on line {seen[(n, m)]})")
        seen[(n, m)] = lineno
        n_rows += 1
        if n > nmax:
            continue
        C[n, m] = values[0]
        S[n, m] = values[1]
        if len(values) >= 4:
            sig_c[n, m] = values[2]
            sig_s[n, m] = values[3]
    if n_rows == 0:
        raise GfcError(f"gravity-field file {path}: no coefficient rows after 'end_of_head'")

    if norm_in_file == "unnormalized":
        for n in range(nmax + 1):
            for m in range(n + 1):
                f = normalisation_factor(n, m)
                C[n, m] /= f
                S[n, m] /= f
                sig_c[n, m] /= f
                sig_s[n, m] /= f

    return GravityField(name=name, gm=gm, radius=radius, max_degree=nmax, tide_system=tide_system,
                        norm="fully_normalized", C=C, S=S, sigma_c=sig_c, sigma_s=sig_s,
                        source_path=path.resolve(), norm_in_file=norm_in_file, errors=errors,
                        file_max_degree=file_max)
