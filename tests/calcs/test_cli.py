"""``python -m calcs CASE.json``: good case, bad inputs, no traceback."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

GOOD = {
    "demand_mode": "low",
    "target_pfd_avg": 5e-3,
    "subsystems": [
        {"name": "reactor pressure transmitters", "voting": "2oo3",
         "lambda_du_per_hour": 1e-7, "lambda_dd_per_hour": 9e-7, "beta": 0.1, "beta_d": 0.05,
         "proof_test_interval_hours": 8760, "sff": 0.92, "hft_type": "B",
         "systematic_capability": 2},
        {"name": "safety PLC", "voting": "1oo1", "lambda_du_per_hour": 5e-9,
         "lambda_dd_per_hour": 5e-7, "proof_test_interval_hours": 87600},
        {"name": "feed shutoff valves", "voting": "1oo2", "lambda_du_per_hour": 2e-6,
         "beta": 0.05, "proof_test_interval_hours": 8760},
    ],
}


def run(args, stdin=None):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    env.pop("DJANGO_SETTINGS_MODULE", None)
    return subprocess.run([sys.executable, "-m", "calcs", *args], input=stdin, text=True,
                          capture_output=True, check=False, cwd=ROOT, env=env, timeout=60)


def write(tmp_path, data, name="case.json"):
    path = tmp_path / name
    path.write_text(data if isinstance(data, str) else json.dumps(data))
    return str(path)


def test_good_case(tmp_path):
    proc = run([write(tmp_path, GOOD)])
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    # by hand from the IEC 61508-6:2010 Annex B eqs. (check-values section 1 [R]):
    # 2oo3: 6*(9.45E-8... ) -> 4.4957E-5 ; 1oo1 logic 5E-9*43808 + 5E-7*8 = 2.2304E-4;
    # 1oo2 valves 2*(1.9E-6)^2*4388*2928 + 0.05*2E-6*4388 = 5.3156E-4; sum 8.0017E-4
    assert out["pfd_avg"] == pytest.approx(8.0017e-4, rel=1e-3)
    assert out["subsystems"][2]["pfd_avg"] == pytest.approx(5.3156e-4, rel=1e-3)
    assert out["rrf"] == pytest.approx(1 / 8.0017e-4, rel=1e-3)
    assert out["sil"] == 3
    assert out["method"] == "iec61508-6"
    assert out["pfh_per_hour"] is None
    assert out["meets_target"] is True
    assert out["max_proof_test_interval_hours"] > 8760
    assert [s["name"] for s in out["subsystems"]] == [s["name"] for s in GOOD["subsystems"]]
    # Route 1H (IEC 61508-2 Table 3, type B, SFF 92 %, HFT 1 -> SIL 3, check-values S3.8d);
    # 1oo1 PLC: IEC 61511-1:2016 Table 6, HFT 0 low demand -> SIL 2 (check-values S3.7b)
    assert [s["architectural_sil"] for s in out["subsystems"]] == [3, 2, 3]
    assert out["claimable_sil"] == 2
    assert proc.stderr == ""


def test_stdin_and_high_demand():
    case = {"demand_mode": "high", "target_pfh_per_hour": 1e-7, "subsystems": [
        {"name": "speed sensors", "voting": "1oo2", "lambda_du_per_hour": 5e-8,
         "lambda_dd_per_hour": 4.5e-7, "beta": 0.02, "beta_d": 0.01,
         "proof_test_interval_hours": 8760}]}
    proc = run(["-"], stdin=json.dumps(case))
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    # IEC 61508-6:2010 B.3.3.2 [R], check-values S1.15
    assert out["pfh_per_hour"] == pytest.approx(5.5216e-9, rel=1e-3)
    assert out["sil"] == 4  # PFH < 1e-8: SIL 4 band, IEC 61511-1:2016 Table 5 [V]
    assert out["meets_target"] is True


def test_partial_and_imperfect_tests_from_json(tmp_path):
    case = {"subsystems": [{"name": "valve", "voting": "1oo1", "lambda_du_per_hour": 2e-6,
                            "mttr_hours": 0, "proof_test_interval_hours": 17520,
                            "partial_test_interval_hours": 730, "partial_test_coverage": 0.6}]}
    out = json.loads(run([write(tmp_path, case)]).stdout)
    assert out["pfd_avg"] == pytest.approx(7.4460e-3, rel=1e-3)  # check-values S6.1a [R]
    case["subsystems"][0] = {"name": "valve", "voting": "1oo1", "lambda_du_per_hour": 2e-6,
                             "mttr_hours": 0, "proof_test_interval_hours": 8760,
                             "proof_test_coverage": 0.9, "mission_time_hours": 131400}
    out = json.loads(run([write(tmp_path, case)]).stdout)
    assert out["pfd_avg"] == pytest.approx(2.1024e-2, rel=1e-3)  # check-values S2.6 [V]


def _bad(**changes):
    data = json.loads(json.dumps(GOOD))
    for key, value in changes.items():
        if key.startswith("sub0_"):
            field = key[5:]
            if value is KeyError:
                del data["subsystems"][0][field]
            else:
                data["subsystems"][0][field] = value
        elif value is KeyError:
            del data[key]
        else:
            data[key] = value
    return data


@pytest.mark.parametrize(
    "data, needle",
    [
        (_bad(sub0_voting="3oo2"), "subsystems[0].voting"),
        (_bad(sub0_beta=1.5), "subsystems[0].beta: must be between 0 and 1, got 1.5"),
        (_bad(sub0_lambda_du_per_hour=-1e-6), "subsystems[0].lambda_du_per_hour"),
        (_bad(sub0_lambda_du_per_hour=KeyError), "subsystems[0].lambda_du_per_hour: is required"),
        (_bad(sub0_proof_test_interval_hours="one year"),
         "subsystems[0].proof_test_interval_hours"),
        (_bad(sub0_proof_test_coverage=0.8), "subsystems[0].mission_time_hours"),
        (_bad(sub0_partial_test_coverage=0.5), "subsystems[0].partial_test_interval_hours"),
        (_bad(sub0_hft_type="C"), "subsystems[0].hft_type"),
        (_bad(subsystems=KeyError), "subsystems: is required"),
        (_bad(subsystems={"name": "x"}), "subsystems: must be a list"),
        (_bad(subsystems=[]), "subsystems"),
        (_bad(demand_mode="sometimes"), "demand_mode"),
        (_bad(target_pfd_avg=-1), "target_pfd_avg"),
        ([1, 2, 3], "case: must be a JSON object"),
        ("{\"subsystems\": [", "not valid JSON"),
        (('{"subsystems": [{"name": "a", "voting": "1oo1", "lambda_du_per_hour": NaN, '
          '"proof_test_interval_hours": 8760}]}'), "subsystems[0].lambda_du_per_hour"),
    ],
)
def test_bad_input_one_line_no_traceback(tmp_path, data, needle):
    proc = run([write(tmp_path, data)])
    assert proc.returncode == 2
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("error: ")
    assert needle in lines[0]
    assert "Traceback" not in proc.stderr


def test_missing_file(tmp_path):
    proc = run([str(tmp_path / "nowhere.json")])
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [f"error: {tmp_path / 'nowhere.json'}: file not found"]


def test_wrong_arguments():
    proc = run([])
    assert proc.returncode == 2 and len(proc.stderr.strip().splitlines()) == 1
    proc = run(["a.json", "b.json"])
    assert proc.returncode == 2 and "Traceback" not in proc.stderr


def test_history_mode_adds_the_achieved_pfd(tmp_path):
    case = {**GOOD, "in_service": "2020-01-01",
            "window": {"start": "2021-01-01", "end": "2022-01-01"}}
    case["subsystems"] = [{**case["subsystems"][0], "tests": [{"date": "2021-01-01"}]}]
    proc = run([write(tmp_path, case)])
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert 0 < out["achieved_pfd_avg"] < 1
    assert "achieved_pfd_avg" in out["subsystems"][0]


# --- Hostile and careless cases: refused with exit 2 and one line naming the key --------

HISTORY = {**GOOD, "in_service": "2020-01-01", "as_of": "2024-01-01"}


def _hist(**top):
    data = json.loads(json.dumps(HISTORY))
    data.update(top)
    return data


def _main(tmp_path, capsys, data):
    """The command's entry point in this process (fast); returns (status, stdout, stderr)."""
    from calcs.__main__ import main

    status = main([write(tmp_path, data)])
    out, err = capsys.readouterr()
    return status, out, err


@pytest.mark.parametrize(
    "data, needle",
    [
        # a misspelt key is named with the nearest known one, not replaced by a default
        (_bad(sub0_proof_test_covrage=0.6),
         'subsystems[0].proof_test_covrage: unknown key; did you mean "proof_test_coverage"'),
        (_bad(target_pdf_avg=1e-3), 'target_pdf_avg: unknown key; did you mean "target_pfd_avg"'),
        (_bad(zzz=1), "zzz: unknown key"),
        (_hist(bypasses=[{"start": "2022-01-01", "ende": "2022-01-02"}]),
         'bypasses[0].ende: unknown key; did you mean "end"'),
        (_hist(window={"start": "2023-01-01", "edn": "2024-01-01"}), "window.edn: unknown key"),
        # a bypass or a window that ends before it starts
        (_hist(bypasses=[{"start": "2022-01-02", "end": "2022-01-01"}]),
         "bypasses[0].end: 2022-01-01T00:00:00 is before the start"),
        (_hist(window={"start": "2023-06-01", "end": "2023-01-01"}), "window.end"),
        # numbers: finite and inside their range (calcs.engine.units.BOUNDS)
        (_bad(sub0_mttr_hours=1e308), "subsystems[0].mttr_hours: must be between 0 and 8760 h"),
        (_bad(sub0_proof_test_interval_hours=0), "subsystems[0].proof_test_interval_hours"),
        (_bad(sub0_mrt_hours=-1), "subsystems[0].mrt_hours"),
        (_bad(target_pfd_avg=float("inf")), "target_pfd_avg: must be a finite number"),
        (_bad(target_pfd_avg="0.01"), "target_pfd_avg: must be a number"),
        # dates inside the plausible window
        (_hist(in_service="0001-01-01"), "in_service: 0001-01-01 is before 1960-01-01"),
        (_hist(as_of="9999-12-31"), "as_of: 9999-12-31 is more than 10 years ahead"),
        (_hist(in_service="the spring"), "in_service"),
        # text where text is meant
        (_bad(sub0_name=7), "subsystems[0].name: must be a text"),
    ],
)
def test_careless_case_is_refused(tmp_path, capsys, data, needle):
    status, out, err = _main(tmp_path, capsys, data)
    assert status == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert needle in lines[0], lines[0]


def test_the_same_case_spelt_right_runs(tmp_path, capsys):
    """The refusals above are of the fault, not of the case: spelt right, it runs."""
    data = _bad(sub0_proof_test_coverage=0.6, sub0_mission_time_hours=175200)
    status, out, _ = _main(tmp_path, capsys, data)
    assert status == 0
    assert json.loads(out)["pfd_avg"] > 0
    hist = _hist(bypasses=[{"start": "2022-01-01", "end": "2022-01-02"}])
    status, out, _ = _main(tmp_path, capsys, hist)
    assert status == 0
    assert json.loads(out)["achieved_pfd_avg"] > 0


@pytest.mark.parametrize("text", [
    "[" * 100_000 + "]" * 100_000,
    '{"a": ' * 100_000 + "1" + "}" * 100_000,
])
def test_deeply_nested_json_exits_2(tmp_path, text):
    proc = run([write(tmp_path, text)])
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [
        f"error: {tmp_path / 'case.json'}: the case is nested too deeply"]
