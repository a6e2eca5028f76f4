"""Tests of the CCSDS OEM export and reader (propagator.study.oem).

Layout reference: CCSDS 502.0-B-2, Orbit Data Messages, section 5 (OEM in KVN).
The case is a synthetic circular orbit whose arc runs through the leap second at the end
of 2016 (2016-12-31T23:59:60 UTC, IERS Bulletin C 52; it is in Leap_Second.dat of
astropy-iers-data), so UTC epoch text and leap-second handling are both exercised.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from propagator.constants import GM_EARTH, SECONDS_PER_DAY
from propagator.study import hdf5_store as hs
from propagator.study.oem import case_to_oem_text, format_epochs, oem_epoch_to_jd, read_oem, write_oem
from propagator.timescales import Epoch, convert_jd

A = 26.56e6  # m, invented navigation-satellite orbit
N = math.sqrt(GM_EARTH / A**3)  # rad/s, circular orbit (Kepler's third law)
EPOCH_UTC = "2016-12-31T23:58:00 UTC"
T = np.arange(0.0, 301.0, 10.0)  # 23:58:00 .. 00:02:59 UTC, through 23:59:60


def states(t: np.ndarray, inc: float = math.radians(55.0)) -> np.ndarray:
    u = N * t
    ci, si = math.cos(inc), math.sin(inc)
    return np.column_stack([A * np.cos(u), A * np.sin(u) * ci, A * np.sin(u) * si,
                            -A * N * np.sin(u), A * N * np.cos(u) * ci, A * N * np.cos(u) * si])


def make_study(path: Path, t: np.ndarray = T, itrf: bool = False, name: str = "nav-1") -> Epoch:
    ep = Epoch.from_iso(EPOCH_UTC).to("TT")
    st = states(t)
    with hs.StudyStore(path, study_name="oem") as store:
        w = store.begin_case(name, epoch_iso=EPOCH_UTC, epoch_jd1=ep.jd1, epoch_jd2=ep.jd2, epoch_scale="TT",
                             case_config_toml="", force_models=[], extra_attrs={"object_name": "NAV-1"})
        extra = {"states_itrf": st[:, [1, 0, 2, 4, 3, 5]] * 0.5} if itrf else {}
        w.append(t[:7], st[:7], **{k: v[:7] for k, v in extra.items()})
        w.append(t[7:], st[7:], **{k: v[7:] for k, v in extra.items()})
        w.finish({"nfev": 1})
    return ep


def _seconds_since(ep_tt: Epoch, epochs: list[str], time_system: str) -> np.ndarray:
    j1, j2 = oem_epoch_to_jd(epochs, time_system)
    t1, t2 = convert_jd(j1, j2, time_system, "TT")
    return ((t1 - ep_tt.jd1) + (t2 - ep_tt.jd2)) * SECONDS_PER_DAY


def test_header_metadata_and_round_trip_utc(tmp_path: Path) -> None:
    path = tmp_path / "s.h5"
    ep = make_study(path)
    text = case_to_oem_text(path, "nav-1")
    oem = read_oem(text)
    assert oem["header"]["CCSDS_OEM_VERS"] == "2.0"
    assert oem["header"]["ORIGINATOR"] == "longarc"
    assert len(oem["header"]["CREATION_DATE"]) == 19
    md = oem["metadata"]
    assert md["OBJECT_NAME"] == "NAV-1" and md["OBJECT_ID"] == "nav-1"
    assert md["CENTER_NAME"] == "EARTH" and md["REF_FRAME"] == "GCRF" and md["TIME_SYSTEM"] == "UTC"
    assert md["START_TIME"] == "2016-12-31T23:58:00.000000"
    assert md["STOP_TIME"] == "2017-01-01T00:02:59.000000"  # 300 SI seconds incl. the leap second
    # leap second: 23:59:50 is followed by 23:59:60, then 2017-01-01T00:00:00
    assert oem["epochs"][11:14] == ["2016-12-31T23:59:50.000000", "2016-12-31T23:59:60.000000",
                                    "2017-01-01T00:00:09.000000"]
    # states: km and km/s, equal to the stored values to the printed precision (9 / 12 decimals)
    st = hs.read_case(path, "nav-1")["state_gcrf"]
    assert oem["states"].shape == (T.size, 6)
    assert np.max(np.abs(oem["states"][:, :3] - st[:, :3] / 1e3)) <= 0.5e-9 * (1 + 1e-6)
    assert np.max(np.abs(oem["states"][:, 3:] - st[:, 3:] / 1e3)) <= 0.5e-12 * (1 + 1e-3)
    # epochs back to seconds since the case epoch (TT): equal to time_s within 0.5 us
    back = _seconds_since(ep, oem["epochs"], "UTC")
    assert np.max(np.abs(back - T)) < 0.5e-6 + 1e-8


def test_utc_epochs_match_astropy(tmp_path: Path) -> None:
    """Cross-check of the epoch text with astropy Time (test-only reference library)."""
    from astropy.time import Time, TimeDelta
    from astropy.utils import iers

    iers.conf.auto_download = False
    ep = Epoch.from_iso(EPOCH_UTC).to("TT")
    t = np.concatenate([T, [86400.0 * 200 + 0.123456789, -3.0]])
    ours = format_epochs(ep, t, "UTC", 6)
    ref = (Time(ep.jd1, ep.jd2, format="jd", scale="tt") + TimeDelta(t, format="sec")).utc
    ref.precision = 6
    assert ours == [s for s in ref.isot]
    ours_tt = format_epochs(ep, t, "TT", 3)
    ref_tt = Time(ep.jd1, ep.jd2, format="jd", scale="tt") + TimeDelta(t, format="sec")
    ref_tt.precision = 3
    assert ours_tt == [s for s in ref_tt.isot]


def test_tt_and_tai_systems_agree_with_epoch_class(tmp_path: Path) -> None:
    path = tmp_path / "s.h5"
    ep = make_study(path)
    for system in ("TT", "TAI"):
        oem = read_oem(case_to_oem_text(path, "nav-1", time_system=system, epoch_decimals=3))
        assert oem["metadata"]["TIME_SYSTEM"] == system
        expected = [(ep + float(s)).to(system).iso(3).rsplit(" ", 1)[0] for s in T]
        assert oem["epochs"] == expected
        assert np.max(np.abs(_seconds_since(ep, oem["epochs"], system) - T)) < 0.5e-3 + 1e-8


def test_itrf_frame_blocks_and_file(tmp_path: Path) -> None:
    path = tmp_path / "s.h5"
    make_study(path)
    with pytest.raises(ValueError, match="state_itrf"):
        case_to_oem_text(path, "nav-1", ref_frame="ITRF")
    path2 = tmp_path / "s2.h5"
    make_study(path2, itrf=True)
    oem = read_oem(case_to_oem_text(path2, "nav-1", ref_frame="ITRF", ref_frame_label="ITRF2014"))
    assert oem["metadata"]["REF_FRAME"] == "ITRF2014"
    itrf = hs.read_case(path2, "nav-1")["state_itrf"]
    assert np.max(np.abs(oem["states"][:, :3] - itrf[:, :3] / 1e3)) <= 0.5e-9 * (1 + 1e-6)
    # streamed in blocks of 4 rows == one block; file written == text (apart from CREATION_DATE)
    out = write_oem(path2, "nav-1", tmp_path / "nav-1.oem", block_rows=4, version="3.0", comments=["line one"])
    a = [ln for ln in out.read_text().splitlines() if not ln.startswith(("CREATION_DATE", "CCSDS_OEM_VERS", "COMMENT"))]
    b = [ln for ln in case_to_oem_text(path2, "nav-1").splitlines()
         if not ln.startswith(("CREATION_DATE", "CCSDS_OEM_VERS", "COMMENT"))]
    assert a == b
    parsed = read_oem(out.read_text())
    assert parsed["header"]["CCSDS_OEM_VERS"] == "3.0" and "line one" in parsed["comments"]


def test_backward_arc_is_written_in_chronological_order(tmp_path: Path) -> None:
    path = tmp_path / "b.h5"
    ep = make_study(path, t=-T, name="back")
    oem = read_oem(case_to_oem_text(path, "back", time_system="TT"))
    back = _seconds_since(ep, oem["epochs"], "TT")
    assert np.all(np.diff(back) > 0)
    assert np.max(np.abs(back - (-T[::-1]))) < 0.5e-6 + 1e-8
    assert np.max(np.abs(oem["states"][:, 0] - states(-T[::-1])[:, 0] / 1e3)) <= 0.5e-9 * (1 + 1e-6)
    assert oem["metadata"]["START_TIME"] == oem["epochs"][0]
    assert oem["metadata"]["STOP_TIME"] == oem["epochs"][-1]


def test_reader_accepts_kvn_features_and_rejects_garbage() -> None:
    # Constructed to the KVN layout of CCSDS 502.0-B-2 section 5.2 (comments, day-of-year
    # epochs, optional acceleration columns, a covariance block); values invented.
    text = """CCSDS_OEM_VERS = 2.0
COMMENT invented example
CREATION_DATE = 2021-100T00:00:00
ORIGINATOR = TEST

META_START
OBJECT_NAME = SAT
OBJECT_ID = 2021-001A
CENTER_NAME = EARTH
REF_FRAME = GCRF
TIME_SYSTEM = UTC
START_TIME = 2021-100T00:00:00
STOP_TIME = 2021-100T00:01:00
META_STOP
COMMENT data follow
2021-100T00:00:00 7000.0 0.0 0.0 0.0 7.5 0.0 -0.008 0.0 0.0
2021-04-10T00:01:00.5 6999.7 0.45 0.0 -0.0005 7.5 0.0 -0.008 0.0001 0.0
COVARIANCE_START
EPOCH = 2021-100T00:00:00
COV_REF_FRAME = RTN
1.0
COVARIANCE_STOP
"""
    oem = read_oem(text)
    assert oem["metadata"]["OBJECT_ID"] == "2021-001A"
    assert oem["segments"][0]["comments"] == ["data follow"]
    assert oem["states"].shape == (2, 6)
    assert oem["segments"][0]["accelerations"].shape == (2, 3)
    assert len(oem["segments"][0]["covariance_lines"]) == 3
    # day 100 of 2021 is 10 April (2021 is not a leap year: 31+28+31 = 90 days before April)
    j1, j2 = oem_epoch_to_jd(oem["epochs"], "UTC")
    assert ((j1[1] - j1[0]) + (j2[1] - j2[0])) * SECONDS_PER_DAY == pytest.approx(60.5, abs=1e-6)
    with pytest.raises(ValueError, match="data line"):
        read_oem(text.replace("6999.7 0.45", "6999.7"))
    with pytest.raises(ValueError, match="not an OEM"):
        read_oem("META_START\nMETA_STOP\n")
    with pytest.raises(ValueError, match="epoch"):
        read_oem(text.replace("2021-04-10T00:01:00.5", "2021/04/10 00:01"))
