"""The demo's undeclared threshold (frailty × home_nurse at 0.37, scanner/demo.py) is discovered."""
from scanner.demo import write_inputs
from scanner.scan import scan


def test_demo_threshold_found_with_default_settings(tmp_path):
    res = scan(write_inputs(tmp_path, n=80_000, seed=7)).to_dict()
    found = [c for c in res["candidates"] if c["running"] == "frailty"
             and c["treatment"] == "home_nurse" and c["origin"] == "discovered"]
    assert found, "no discovered cutoff for frailty × home_nurse"
    best = found[0]
    assert abs(best["location"] - 0.37) < 0.01
    assert best["location_ci_low"] <= 0.37 + 0.002 and best["location_ci_high"] >= 0.37 - 0.002
    assert best["verdict"] == "usable"
    assert best["discovery_half"]["search_p"] < 0.001 and best["confirm_half"]["p_value"] < 0.001
    assert res["n_grid_points"] > 1000 and res["search"]["split"] is True
    # Declared cutoffs are not duplicated as discovered rows.
    assert not [c for c in res["candidates"] if c["origin"] == "discovered"
                and c["running"] == "egfr" and c["treatment"] == "renal_referral"]
