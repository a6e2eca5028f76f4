"""Tests of the ICGEM .gfc reader and of the shipped default field."""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
import pytest

from forcemodels.gfc import DEFAULT_FIELD_FILE, GfcError, normalisation_factor, read_gfc

EGM96_FILE = "EGM96_deg120.gfc"


def shared_gravity_dir() -> Path | None:
    """The project's shared data folder ``shared/data/gravity`` if present.

    Looked up in ``$LONGARC_SHARED_DATA`` (the ``shared/data`` folder), then beside the
    repository (``<repo parent>/shared/data``, as on the development machine and in CI).
    """
    candidates = []
    if os.environ.get("LONGARC_SHARED_DATA"):
        candidates.append(Path(os.environ["LONGARC_SHARED_DATA"]))
    candidates.append(Path(__file__).resolve().parents[2] / "shared" / "data")
    for c in candidates:
        if (c / "gravity" / EGM96_FILE).is_file():
            return c / "gravity"
    return None


SHARED = shared_gravity_dir()
needs_shared = pytest.mark.skipif(
    SHARED is None, reason="shared/data/gravity/EGM96_deg120.gfc not found (set LONGARC_SHARED_DATA "
                           "or place shared/ beside the repository)")

HEADER = """a test field
product_type           gravity_field
modelname              TESTFIELD
earth_gravity_constant {gm}
radius                 {radius}
max_degree             {nmax}
norm                   {norm}
tide_system            zero_tide
errors                 formal
key    L    M         C                   S              sigma C         sigma S
end_of_head ==========================================
"""


def write(tmp_path: Path, body: str, name: str = "f.gfc", **kw) -> Path:
    fields = {"gm": "0.3986004415E+15", "radius": "0.6378136300E+07", "nmax": 3, "norm": "fully_normalized"}
    fields.update(kw)
    path = tmp_path / name
    path.write_text(HEADER.format(**fields) + body)
    return path


GOOD_ROWS = """gfc 0 0 1.0 0.0 0.0 0.0
gfc 2 0 -0.484165371736e-03 0.0 0.35610635e-10 0.0
gfc 2 1 -0.186987635955e-09 0.119528012031e-08 0.1e-29 0.1e-29
gfc 2 2 0.243914352398e-05 -0.140016683654e-05 0.53739154e-10 0.54353269e-10
gfc 3 0 0.957254173792e-06 0.0 0.18094237e-10 0.0
gfc 3 1 0.202998882184e-05 0.248513158716e-06 0.13965165e-09 0.13645882e-09
gfc 3 2 0.904627768605e-06 -0.619025944205e-06 0.10962329e-09 0.11182866e-09
gfc 3 3 0.721072657057e-06 0.141435626958e-05 0.95156281e-10 0.93285090e-10
"""


# ---- the shipped default field ----------------------------------------------------------

def test_default_field_header_and_values():
    f = read_gfc(DEFAULT_FIELD_FILE)
    assert f.name == "EGM96"
    assert f.max_degree == 8 and f.C.shape == (9, 9)
    # GM, radius, tide system: EGM96 (Lemoine et al. 1998, NASA/TP-1998-206861), as stated
    # in shared/data/gravity/README.md.
    assert f.gm == 3.986004415e14
    assert f.radius == 6378136.3
    assert f.tide_system == "tide_free"
    # Published EGM96 values (shared/data/gravity/README.md "Verified values" table).
    assert f.C[2, 0] == -0.484165371736e-03
    assert (f.C[2, 2], f.S[2, 2]) == (0.243914352398e-05, -0.140016683654e-05)
    assert (f.C[5, 3], f.S[5, 3]) == (-0.451955406071e-06, -0.214847190624e-06)
    assert (f.C[7, 1], f.S[7, 1]) == (0.279872910488e-06, 0.954336911867e-07)
    # every (L, M) with 2 <= L <= 8 present, degree 1 zero
    for n in range(2, 9):
        for m in range(n + 1):
            assert f.C[n, m] != 0.0
    assert np.all(f.C[1] == 0.0) and np.all(f.S[1] == 0.0)
    # J2 = -sqrt(5) C20 (Heiskanen & Moritz 1967).  Sanity check against the IERS zero-tide
    # J2 = 1.0826359e-3 (IERS Conventions 2010 Table 1.1): EGM96 is tide-free, and the
    # permanent-tide part of C_bar_20 (~4.17e-9, IERS Conventions 2010 sec. 6.2.2; from
    # memory) makes them differ by ~9e-6 relative, hence 1e-5.
    assert f.j2() == pytest.approx(1.0826359e-3, rel=1e-5)


@needs_shared
def test_default_field_equals_shared_egm96():
    """Every shipped row equals the full shared EGM96 file (copied verbatim)."""
    small = read_gfc(DEFAULT_FIELD_FILE)
    full = read_gfc(SHARED / EGM96_FILE)
    assert full.max_degree == 120
    assert (small.gm, small.radius, small.tide_system) == (full.gm, full.radius, full.tide_system)
    for arr_s, arr_f in ((small.C, full.C), (small.S, full.S), (small.sigma_c, full.sigma_c),
                         (small.sigma_s, full.sigma_s)):
        np.testing.assert_array_equal(arr_s, arr_f[:9, :9])
    trunc = read_gfc(SHARED / EGM96_FILE, max_degree=8)
    np.testing.assert_array_equal(trunc.C, small.C)
    np.testing.assert_array_equal(trunc.S, small.S)
    # value from the shared README table (ICGEM EGM96.gfc)
    assert full.C[120, 120] == -0.456798788660e-09 and full.S[120, 120] == -0.159135018852e-08


# ---- reading ------------------------------------------------------------------------

def test_read_and_truncate(tmp_path):
    path = write(tmp_path, GOOD_ROWS)
    f = read_gfc(path)
    assert (f.name, f.max_degree, f.tide_system, f.errors, f.norm) == ("TESTFIELD", 3, "zero_tide", "formal",
                                                                        "fully_normalized")
    assert f.C[3, 3] == 0.721072657057e-06 and f.S[3, 2] == -0.619025944205e-06
    assert f.sigma_c[2, 2] == 0.53739154e-10 and f.sigma_s[3, 1] == 0.13645882e-09
    assert f.source_path == path.resolve()
    g = read_gfc(path, max_degree=2)
    assert g.C.shape == (3, 3) and g.max_degree == 2 and g.file_max_degree == 3
    np.testing.assert_array_equal(g.C, f.C[:3, :3])


def test_fortran_d_exponents_and_missing_sigmas(tmp_path):
    rows = "gfc 2 0 -0.484165371736D-03 0.0D+00\ngfc 3 1 0.202998882184d-05 0.248513158716D-06\n"
    f = read_gfc(write(tmp_path, rows, gm="0.3986004415D+15"))
    assert f.gm == 3.986004415e14
    assert f.C[2, 0] == -0.484165371736e-03 and f.C[3, 1] == 0.202998882184e-05
    assert f.S[3, 1] == 0.248513158716e-06
    assert f.sigma_c[2, 0] == 0.0


def test_unnormalised_file_is_converted(tmp_path):
    # unnormalised C_nm = N_nm C_bar_nm, N_nm = sqrt((2-d0m)(2n+1)(n-m)!/(n+m)!)
    # (Heiskanen & Moritz, Physical Geodesy, 1967, eq. 1-73), written out with factorials here.
    def n_fact(n, m):
        return math.sqrt((2 - (m == 0)) * (2 * n + 1) * math.factorial(n - m) / math.factorial(n + m))

    cbar = {(2, 0): -0.484165371736e-03, (2, 2): 0.243914352398e-05, (3, 1): 0.202998882184e-05}
    sbar = {(2, 0): 0.0, (2, 2): -0.140016683654e-05, (3, 1): 0.248513158716e-06}
    rows = "".join(f"gfc {n} {m} {cbar[(n, m)] * n_fact(n, m):.17e} {sbar[(n, m)] * n_fact(n, m):.17e}\n"
                   for (n, m) in cbar)
    f = read_gfc(write(tmp_path, rows, norm="unnormalized"))
    assert f.norm == "fully_normalized" and f.norm_in_file == "unnormalized"
    for (n, m), c in cbar.items():
        assert f.C[n, m] == pytest.approx(c, rel=1e-14)
        assert f.S[n, m] == pytest.approx(sbar[(n, m)], rel=1e-14, abs=0.0)
        assert normalisation_factor(n, m) == pytest.approx(n_fact(n, m), rel=1e-14)
    # unnormalised J2 = -C20 (Heiskanen & Moritz 1967): the converted C_bar_20 gives it back
    assert f.j2() == pytest.approx(-cbar[(2, 0)] * math.sqrt(5.0), rel=1e-14)


# ---- bad input -----------------------------------------------------------------------

def test_missing_file(tmp_path):
    with pytest.raises(GfcError, match="no such file") as exc:
        read_gfc(tmp_path / "nope.gfc")
    assert "nope.gfc" in str(exc.value)


def test_missing_end_of_head(tmp_path):
    path = tmp_path / "bad.gfc"
    path.write_text("earth_gravity_constant 3.986004415e14\nradius 6378136.3\nmax_degree 2\ngfc 2 0 1e-3 0\n")
    with pytest.raises(GfcError, match="end_of_head") as exc:
        read_gfc(path)
    assert "bad.gfc" in str(exc.value)


def test_malformed_rows_name_their_line(tmp_path):
    # header is 11 lines; GOOD_ROWS has 8 rows, so the appended row is line 20
    path = write(tmp_path, GOOD_ROWS + "gfc 3 x 0.1 0.2\n")
    with pytest.raises(GfcError, match=r"line 20\b.*malformed"):
        read_gfc(path)
    path = write(tmp_path, GOOD_ROWS.replace("gfc 2 1 -0.186987635955e-09 0.119528012031e-08 0.1e-29 0.1e-29",
                                             "gfc 2 1 -0.186987635955e-09"))
    with pytest.raises(GfcError, match=r"line 14\b.*malformed"):
        read_gfc(path)
    path = write(tmp_path, GOOD_ROWS.replace("gfc 3 0 0.957254173792e-06", "gfc 3 0 0.95725417x3792e-06"))
    with pytest.raises(GfcError, match=r"line 16\b.*not numbers"):
        read_gfc(path)
    path = write(tmp_path, GOOD_ROWS + "gfc 2 3 0.1 0.2\n")
    with pytest.raises(GfcError, match=r"line 20\b.*L=2, M=3"):
        read_gfc(path)
    path = write(tmp_path, GOOD_ROWS + "gfc 2 2 0.1 0.2\n")
    with pytest.raises(GfcError, match=r"line 20\b.*duplicate.*first on line 15"):
        read_gfc(path)
    path = write(tmp_path, GOOD_ROWS + "gfc 4 0 0.1 0.0\n")
    with pytest.raises(GfcError, match=r"line 20\b.*degree 4 is above.*max_degree 3"):
        read_gfc(path)


def test_time_variable_rows_refused(tmp_path):
    path = write(tmp_path, GOOD_ROWS + "gfct 4 0 0.1 0.0 0 0 20050101\n", nmax=4)
    with pytest.raises(GfcError, match=r"line 20\b.*time-variable"):
        read_gfc(path)


def test_degree_above_file_max_names_both(tmp_path):
    path = write(tmp_path, GOOD_ROWS)
    with pytest.raises(GfcError, match=r"requested degree 12 is above the file's max_degree 3"):
        read_gfc(path, max_degree=12)


@pytest.mark.parametrize("drop, what", [("earth_gravity_constant", "earth_gravity_constant"), ("radius", "radius"),
                                        ("max_degree", "max_degree")])
def test_missing_header_values(tmp_path, drop, what):
    path = write(tmp_path, GOOD_ROWS)
    text = "\n".join(ln for ln in path.read_text().splitlines() if not ln.startswith(drop))
    path.write_text(text + "\n")
    with pytest.raises(GfcError, match=what):
        read_gfc(path)


def test_no_rows(tmp_path):
    with pytest.raises(GfcError, match="no coefficient rows"):
        read_gfc(write(tmp_path, ""))
