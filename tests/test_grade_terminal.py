"""The terminal verdict of ``vidodo grade`` shows each drift figure with its 1-sigma."""

from types import SimpleNamespace

from vidodo.commands.grade import verdict_lines


def _result(sigma):
    m = SimpleNamespace(final_err_m=0.0123, final_heading_err_rad=0.0349, drift_pct=1.25,
                        ate_rmse_m=0.0081, max_err_m=0.0456, max_err_t_s=7.5, sigma=sigma)
    clock = SimpleNamespace(offset_s=-3.25, method="auto", sigma_s=0.0004, confidence=0.99,
                            source="imu")
    return SimpleNamespace(clock=clock, metrics={"drive": m}, passed={"drive": True},
                           event_list=[], verdict="graded")


def test_figures_carry_their_sigma():
    """Value and 1-sigma in the same unit (0.0349 rad = 2.0 deg, 0.0052 rad = 0.3 deg:
    degrees = radians x 180 / pi)."""
    sigma = {"final_err_m": 0.0004, "final_heading_err_rad": 0.0052, "drift_pct": 0.06,
             "ate_rmse_m": 0.0003, "max_err_m": 0.0011}
    line = verdict_lines(_result(sigma))[1]
    assert "final 12 +-0.4 mm / 2.0 +-0.3 deg" in line
    assert "drift 1.2 +-0.1 %" in line
    assert "ATE 8 +-0.3 mm" in line
    assert "max 46 +-1.1 mm at 7.5 s" in line


def test_small_sigma_keeps_a_significant_digit():
    """A 1-sigma below the figure's last digit is printed to its first significant
    digit (0.004 %), never as "+-0.0", which would read as exact."""
    line = verdict_lines(_result({"drift_pct": 0.004}))[1]
    assert "drift 1.2 +-0.004 %" in line


def test_figures_without_sigma_are_plain():
    """A source whose sigma could not be propagated shows the bare figure, never a made-up
    one."""
    line = verdict_lines(_result(None))[1]
    assert "+-" not in line
    assert "final 12 mm" in line and "max 46 mm" in line
