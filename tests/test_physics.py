"""Tests of fleetwatch.physics: the check values of domain.md section 6 and identities.

Each check value names its source beside it, as domain.md section 6 gives it.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fleetwatch import physics as ph

approx = pytest.approx


# ---------------------------------------------------------------- check values, domain.md 6
def test_check_2_ratio_and_slip():
    # domain.md 6 #2 (derived): n_in 1450, n_out 570, i_cmd 2.5 -> i_act 2.5439, s 1.724 %
    assert ph.actual_ratio(1450.0, 570.0) == approx(2.5439, abs=1e-4)
    assert ph.slip(1450.0, 570.0, 2.5) == approx(0.01724, abs=1e-5)


def test_check_3_power():
    # domain.md 6 #3 (derived, P = T*omega): 10 N*m at 1450 rpm -> 151.84 rad/s, 1518.4 W
    assert ph.omega_from_rpm(1450.0) == approx(151.84, abs=0.01)
    assert ph.mech_power_w(10.0, 1450.0) == approx(1518.4, abs=0.1)
    # domain.md 1.2 shortcut P[kW] = T*n/9549.3 (derived)
    assert ph.mech_power_w(10.0, 1450.0) / 1000.0 == approx(10.0 * 1450.0 / 9549.3, rel=1e-5)


def test_check_4_series_slip():
    # domain.md 6 #4 (derived): s1 1 %, s2 1.5 % -> s_tot 2.485 %
    assert ph.series_slip(0.01, 0.015) == approx(0.02485, abs=1e-9)


def test_check_5_efficiency_split():
    # domain.md 6 #5 (derived): T_in 5, T_out 11.5 N*m, i_kin 2.5, n as #2
    # -> eta 0.9041, eta_T 0.92, (1-s)*eta_T 0.9041
    p_in = ph.mech_power_w(5.0, 1450.0)
    eta = ph.efficiency(11.5, 570.0, p_in)
    eta_t = ph.torque_efficiency(5.0, 11.5, 2.5)
    s = ph.slip(1450.0, 570.0, 2.5)
    assert eta == approx(0.9041, abs=1e-4)
    assert eta_t == approx(0.92, abs=1e-12)
    assert (1.0 - s) * eta_t == approx(0.9041, abs=1e-4)


def test_check_6_spin_band():
    # domain.md 6 #6 (derived from Orthwein): w 10 mm, R 50 mm -> +/-10 % edge mismatch
    assert ph.spin_edge_mismatch(0.010, 0.050) == approx(0.10)


def test_check_7_openstax_back_emf():
    # domain.md 6 #7: OpenStax College Physics 2012, ch. 23 problem 42:
    # 6.00 V supply, 4.50 V back-EMF, 3.00 A -> R 0.500 ohm, I_start 12.0 A, E*I 13.5 W of 18 W
    r_ohm = (6.00 - 4.50) / 3.00
    assert r_ohm == approx(0.500)
    assert ph.back_emf_v(6.00, 3.00, r_ohm) == approx(4.50)
    assert ph.locked_rotor_current_a(6.00, r_ohm) == approx(12.0)
    assert ph.back_emf_v(6.00, 3.00, r_ohm) * 3.00 == approx(13.5)
    assert 6.00 * 3.00 == approx(18.0)


def test_check_8_dc_model():
    # domain.md 6 #8 (derived): V 24, I 2, R 1.5, 2000 rpm, I_0 0.2 A -> E 21 V,
    # omega 209.44, k 0.100268, T_em 0.20054, P_em 42 W, T_shaft 0.18048, P_shaft 37.8 W,
    # eta 78.75 %
    omega = ph.omega_from_rpm(2000.0)
    k = ph.motor_constant(24.0, 2.0, 1.5, omega)
    assert ph.back_emf_v(24.0, 2.0, 1.5) == approx(21.0)
    assert omega == approx(209.44, abs=0.01)
    assert k == approx(0.100268, abs=1e-6)
    assert ph.em_torque_nm(k, 2.0) == approx(0.20054, abs=1e-5)
    assert ph.em_torque_nm(k, 2.0) * omega == approx(42.0)
    assert ph.shaft_torque_nm(k, 2.0, 0.2) == approx(0.18048, abs=1e-5)
    assert ph.shaft_power_w(k, 2.0, 0.2, omega) == approx(37.8)
    assert ph.motor_efficiency(24.0, 2.0, k, 0.2, omega) == approx(0.7875)
    # the same operating point seen from the other side of V = I*R + k*omega
    assert ph.armature_current_a(24.0, omega, 1.5, k) == approx(2.0)
    assert ph.motor_voltage_v(2.0, omega, 1.5, k) == approx(24.0)


def test_check_9_winding_resistance():
    # domain.md 6 #9 (derived, alpha 0.00393 from memory): 1.5 ohm at 20 C -> 1.854 ohm at 80 C
    assert ph.winding_resistance(1.5, 80.0) == approx(1.854, abs=5e-4)
    assert ph.resistance_at_reference(ph.winding_resistance(1.5, 80.0), 80.0) == approx(1.5)
    # domain.md 1.4: a 60 K rise adds ~24 % (derived)
    assert ph.winding_resistance(1.0, 80.0) - 1.0 == approx(0.24, abs=0.01)


def test_check_10_induction_slip():
    # domain.md 6 #10, rftools.io worked example: 4-pole, 60 Hz, 1746 rpm
    # -> n_s 1800, s 3.0 %, f_r 1.8 Hz
    n_s = ph.synchronous_speed_rpm(60.0, 4)
    s = ph.induction_slip(n_s, 1746.0)
    assert n_s == approx(1800.0)
    assert s == approx(0.030)
    assert ph.rotor_frequency_hz(s, 60.0) == approx(1.8)


def test_check_21_wheel_at_centre_of_identical_cones():
    # domain.md 6 #21 (common practice, no source): r_in = r_out -> i = 1
    assert ph.cone_ratio(0.060, 0.020, 0.080, 0.120) == approx(1.0)
    assert ph.cone_position(1.0, 0.020, 0.080, 0.120) == approx(0.060)
    r_in, r_out = ph.cone_radii(0.060, 0.020, 0.080, 0.120)
    assert r_in == approx(r_out)


def test_check_22_ideal_torque_multiplication():
    # domain.md 6 #22 (common practice, no source): input 5 turns while output turns 1
    # instead of 2 -> i from 2.5 to 5, ideal output torque doubles, power conserved
    i_before, i_after = ph.actual_ratio(5.0, 2.0), ph.actual_ratio(5.0, 1.0)
    assert (i_before, i_after) == (approx(2.5), approx(5.0))
    t_before = ph.output_torque_nm(1.0, i_before)
    t_after = ph.output_torque_nm(1.0, i_after)
    assert t_after / t_before == approx(2.0)
    # power at the output equals power at the input (ideal, no slip)
    assert ph.mech_power_w(t_after, 1.0) == approx(ph.mech_power_w(1.0, 5.0))


def test_cone_ends_give_extreme_ratios():
    # wheel at x = 0 sits on the small end of the input cone: largest reduction r_l/r_s
    assert ph.cone_ratio(0.0, 0.02, 0.08, 0.12) == approx(4.0)
    assert ph.cone_ratio(0.12, 0.02, 0.08, 0.12) == approx(0.25)
    # off the cones, or a ratio the cones cannot make
    assert math.isnan(ph.cone_ratio(0.13, 0.02, 0.08, 0.12))
    assert math.isnan(ph.cone_position(4.5, 0.02, 0.08, 0.12))
    assert math.isnan(ph.cone_position(1.0, 0.05, 0.05, 0.12))


# ---------------------------------------------------------------- singular cases: NaN, no raise
def test_zero_speed_gives_nan_without_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a RuntimeWarning would fail the test
        assert math.isnan(ph.actual_ratio(1450.0, 0.0))
        assert math.isnan(ph.slip(0.0, 0.0, 2.0))
        assert math.isnan(ph.motor_constant(10.0, 12.0, 0.8, 0.0))
        assert math.isnan(ph.efficiency(1.0, 100.0, 0.0))
        assert math.isnan(ph.torque_efficiency(0.0, 1.0, 2.0))
        assert math.isnan(ph.motor_efficiency(0.0, 0.0, 0.3, 0.3, 0.0))
        assert math.isnan(ph.locked_rotor_current_a(48.0, 0.0))
        arr = ph.slip(np.array([1000.0, 0.0, np.nan]), np.array([500.0, 0.0, 1.0]), 2.0)
    assert arr.shape == (3,)
    assert arr[0] == approx(0.0)
    assert np.isnan(arr[1]) and np.isnan(arr[2])


def test_scalar_in_scalar_out_array_in_array_out():
    assert np.ndim(ph.slip(1450.0, 570.0, 2.5)) == 0
    assert ph.omega_from_rpm(np.array([0.0, 60.0])).shape == (2,)
    assert ph.rpm_from_omega(ph.omega_from_rpm(1234.5)) == approx(1234.5)


def test_fit_motor_constants_degenerate_cases():
    nan_fit = ph.fit_motor_constants([1.0, 2.0], [1.0, 2.0], [1.0, 2.0])
    assert all(math.isnan(x) for x in nan_fit[:3]) and nan_fit[3] == 2
    # rows with NaN are ignored: only two usable rows left
    r = ph.fit_motor_constants([1.0, 2.0, np.nan, 4.0], [1.0, 2.0, 3.0, np.nan],
                               [5.0, 6.0, 7.0, 8.0])
    assert r[3] == 2 and math.isnan(r[0])
    # stall only (omega all zero): k_e cannot be seen
    stall = ph.fit_motor_constants([10.0, 11.0, 12.0], [12.0, 13.0, 14.0], [0.0, 0.0, 0.0])
    assert math.isnan(stall[0]) and math.isnan(stall[1]) and stall[3] == 3
    # one operating point repeated: i and omega collinear
    same = ph.fit_motor_constants([40.0] * 5, [3.0] * 5, [130.0] * 5)
    assert math.isnan(same[0])


def test_traction_curve_shape():
    mu_max, s_p = 0.7, 0.06
    assert ph.traction_coefficient(s_p, mu_max, s_p) == approx(mu_max)  # peak at s_p
    small = 1e-4
    slope = ph.traction_coefficient(small, mu_max, s_p) / small
    assert slope == approx(2 * mu_max / s_p, rel=1e-3)  # linear start
    assert ph.traction_coefficient(3 * s_p, mu_max, s_p) < mu_max  # falls in gross slip
    assert ph.slip_for_traction(mu_max, mu_max, s_p) == math.inf
    assert ph.slip_for_traction(0.9, mu_max, s_p) == math.inf
    assert ph.slip_for_traction(-0.9, mu_max, s_p) == -math.inf
    assert ph.slip_for_traction(0.0, mu_max, s_p) == 0.0
    assert math.isnan(ph.slip_for_traction(0.1, 0.0, s_p))


# ---------------------------------------------------------------- identities (hypothesis)
speeds = st.floats(min_value=50.0, max_value=5000.0)
ratios = st.floats(min_value=0.2, max_value=5.0)
slips = st.floats(min_value=-0.2, max_value=0.6)


@given(n_in=speeds, i_cmd=ratios, s=slips, eta_t=st.floats(0.3, 1.0))
def test_efficiency_is_one_minus_slip_times_torque_efficiency(n_in, i_cmd, s, eta_t):
    # domain.md 1.2: eta = (1 - s) * eta_T
    n_out = n_in * (1.0 - s) / i_cmd
    t_in = 2.0
    t_out = ph.output_torque_nm(t_in, i_cmd, eta_t)
    eta = ph.efficiency(t_out, n_out, ph.mech_power_w(t_in, n_in))
    s_meas = ph.slip(n_in, n_out, i_cmd)
    assert eta == approx((1.0 - s_meas) * ph.torque_efficiency(t_in, t_out, i_cmd), rel=1e-9)


@given(n_in=speeds, i_cmd=ratios, s=slips)
def test_ratio_and_slip_round_trip(n_in, i_cmd, s):
    i_act = ph.ratio_from_slip(i_cmd, s)
    n_out = n_in / i_act
    assert ph.actual_ratio(n_in, n_out) == approx(i_act, rel=1e-9)
    assert ph.slip(n_in, n_out, i_cmd) == approx(s, abs=1e-9)


@given(st.lists(st.floats(min_value=-0.5, max_value=0.9), min_size=1, max_size=5))
def test_series_slip_composes(ss):
    # 1 - s_tot = prod(1 - s_k), and composing in two stages gives the same total
    total = ph.series_slip(*ss)
    assert 1.0 - total == approx(float(np.prod([1.0 - s for s in ss])), rel=1e-9, abs=1e-12)
    head = ph.series_slip(*ss[:1])
    assert ph.series_slip(head, ph.series_slip(*ss[1:])) == approx(total, abs=1e-12)
    # series stages multiply ratios (domain.md 1.1, kfz-tech.de): slips compose the same way
    assert ph.series_slip(0.0, *ss) == approx(total, abs=1e-15)


@given(u=st.floats(0.0, 1.0), r_small=st.floats(0.005, 0.05), span=st.floats(0.005, 0.1),
       length=st.floats(0.02, 0.5))
def test_cone_ratio_and_position_are_inverse(u, r_small, span, length):
    r_large = r_small + span
    x = u * length
    i_kin = ph.cone_ratio(x, r_small, r_large, length)
    assert r_small / r_large - 1e-12 <= i_kin <= r_large / r_small + 1e-12
    assert ph.cone_position(i_kin, r_small, r_large, length) == approx(x, abs=1e-9 * length)
    # contact radii of the opposed cones always add up to r_small + r_large
    r_in, r_out = ph.cone_radii(x, r_small, r_large, length)
    assert r_in + r_out == approx(r_small + r_large)


@given(r_ohm=st.floats(0.05, 5.0), k_e=st.floats(0.01, 2.0), seed=st.integers(0, 2**32 - 1))
@settings(max_examples=60)
def test_fit_motor_constants_recovers_exact_constants(r_ohm, k_e, seed):
    rng = np.random.default_rng(seed)
    i = rng.uniform(0.2, 10.0, 40)
    omega = rng.uniform(20.0, 300.0, 40)
    v = ph.motor_voltage_v(i, omega, r_ohm, k_e)
    v[3] = np.nan  # a NaN row is skipped, not fatal
    r_fit, k_fit, resid, n = ph.fit_motor_constants(v, i, omega)
    assert n == 39
    assert r_fit == approx(r_ohm, rel=1e-8)
    assert k_fit == approx(k_e, rel=1e-8)
    assert resid < 1e-9 * (1.0 + float(np.nanmax(v)))


@given(mu_frac=st.floats(-0.999, 0.999), mu_max=st.floats(0.02, 1.2),
       s_p=st.floats(0.005, 0.2))
def test_traction_inverse_round_trip(mu_frac, mu_max, s_p):
    mu = mu_frac * mu_max
    s = ph.slip_for_traction(mu, mu_max, s_p)
    assert abs(s) <= s_p * (1 + 1e-12)  # stable branch only
    assert ph.traction_coefficient(s, mu_max, s_p) == approx(mu, abs=1e-9 * mu_max)


@given(v=st.floats(1.0, 400.0), r_ohm=st.floats(0.05, 10.0), k=st.floats(0.01, 2.0),
       omega=st.floats(0.0, 400.0))
def test_dc_power_balance(v, r_ohm, k, omega):
    # domain.md 1.4: V*I = E*I + I^2*R and E*I = T_em*omega (k_e = k_t in SI)
    i = ph.armature_current_a(v, omega, r_ohm, k)
    e = ph.back_emf_v(v, i, r_ohm)
    assert v * i == approx(e * i + i * i * r_ohm, rel=1e-9, abs=1e-9)
    assert e * i == approx(ph.em_torque_nm(k, i) * omega, rel=1e-9, abs=1e-9)
