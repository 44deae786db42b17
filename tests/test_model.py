"""LayerModel validation and queries (invert/model.py).

Every bad input must raise ValueError whose message names the field and the layer
(users number layers 1..N+1 from the top, N+1 being the half-space).

Vp/Vs limit of a solid: bulk modulus K = rho (Vp^2 - 4/3 Vs^2) > 0  <=>  Vp/Vs > sqrt(4/3)
(common practice); a fluid has Vs = 0 (Vp/Vs = inf).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from invert.model import LayerModel

SQRT43 = math.sqrt(4.0 / 3.0)


def _raises(match_field: str, match_layer: str | None, **kwargs):
    with pytest.raises(ValueError) as info:
        LayerModel.build(**kwargs)
    msg = str(info.value)
    assert match_field in msg, msg
    if match_layer is not None:
        assert match_layer in msg, msg
    return msg


# ---------------------------------------------------------------- thickness
@pytest.mark.parametrize("bad, layer", [(0.0, "layer 2"), (-5.0, "layer 2")])
def test_thickness_not_positive(bad, layer):
    _raises("thickness", layer, thickness=[10.0, bad], vp=[1000.0, 2000.0, 3000.0], vpvs=1.8)


def test_thickness_not_positive_first_layer_and_batch():
    msg = _raises("thickness", "layer 1", thickness=[[10.0, 5.0], [-1.0, 5.0]],
                  vp=[1000.0, 2000.0, 3000.0], vpvs=1.8)
    assert "model 1" in msg


# ----------------------------------------------------------------------- vp
@pytest.mark.parametrize("bad", [0.0, -100.0])
def test_vp_not_positive_at_top(bad):
    _raises("vp", "layer 1", thickness=[10.0], vp=[bad, 2000.0], vs=[0.0, 1000.0])
    _raises("vp", "half-space", thickness=[10.0], vp=[1000.0, bad], vs=[500.0, 0.0])


def test_vp_reaches_zero_at_base_through_gradient():
    # 1000 m/s - 10 /s * 100 m = 0 at the base of layer 1: Vp <= 0 there.
    _raises("vp", "layer 1", thickness=[100.0], vp=[1000.0, 2000.0], vpvs=2.0, gradient=[-10.0, 0.0])
    # the middle layer: 2000 - 25 * 100 = -500 at its base
    _raises("vp", "layer 2", thickness=[50.0, 100.0], vp=[1000.0, 2000.0, 3000.0], vpvs=2.0,
            gradient=[0.0, -25.0, 0.0])


def test_vp_just_positive_at_base_is_accepted():
    m = LayerModel.build([100.0], [1000.0, 2000.0], vpvs=2.0, gradient=[-9.99, 0.0])
    assert m.base_velocity("P")[0, 0] == pytest.approx(1.0)


def test_half_space_with_falling_velocity_is_rejected():
    # v(z) = 3000 - 0.1 z reaches 0 at 30 km depth inside the (infinite) half-space
    _raises("vp", "half-space", thickness=[100.0], vp=[1000.0, 3000.0], vpvs=2.0, gradient=[0.0, -0.1])


# ----------------------------------------------------------------------- vs
def test_vs_negative_at_top():
    _raises("vs", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vs=[-1.0, 1000.0])
    _raises("vs", "half-space", thickness=[10.0], vp=[1000.0, 2000.0], vs=[500.0, -1.0])


def test_vs_negative_at_base_through_gradient():
    # Vs 1000 - 20 * 100 = -1000 at the base of layer 1
    _raises("vs", "layer 1", thickness=[100.0], vp=[3000.0, 4000.0], vs=[1000.0, 2000.0],
            vs_gradient=[-20.0, 0.0])


def test_vs_negative_in_half_space_through_gradient():
    _raises("vs", "half-space", thickness=[100.0], vp=[3000.0, 4000.0], vs=[1000.0, 2000.0],
            vs_gradient=[0.0, -0.5])


# -------------------------------------------------------------- NaN and inf
@pytest.mark.parametrize("field", ["thickness", "vp", "vs", "gradient"])
def test_nan_is_rejected_naming_field_and_layer(field):
    kwargs = dict(thickness=[10.0, 20.0], vp=[1000.0, 2000.0, 3000.0], vs=[500.0, 1000.0, 1500.0],
                  gradient=[0.0, 0.0, 0.0])
    arr = list(kwargs[field])
    arr[1] = math.nan
    kwargs[field] = arr
    _raises(field, "layer 2", **kwargs)


def test_nan_vpvs_and_vs_gradient_rejected():
    _raises("vpvs", "half-space", thickness=[10.0], vp=[1000.0, 2000.0], vpvs=[1.8, math.nan])
    _raises("vs_gradient", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vs=[500.0, 1000.0],
            vs_gradient=[math.nan, 0.0])


def test_infinite_velocity_rejected():
    _raises("vp", "half-space", thickness=[10.0], vp=[1000.0, math.inf], vpvs=2.0)


# ------------------------------------------------------------------- shapes
def test_thickness_count_must_match_vp():
    _raises("thickness", None, thickness=[10.0, 20.0], vp=[1000.0, 2000.0], vpvs=2.0)
    _raises("thickness", None, thickness=[], vp=[1000.0, 2000.0], vpvs=2.0)


@pytest.mark.parametrize("field", ["vs", "gradient"])
def test_per_layer_field_wrong_length(field):
    kwargs = dict(thickness=[10.0], vp=[1000.0, 2000.0], vs=[500.0, 1000.0])
    kwargs[field] = [1.0, 2.0, 3.0]
    _raises(field, None, **kwargs)


def test_batch_size_mismatch():
    _raises("thickness", None, thickness=[[10.0], [20.0]], vp=[[1000.0, 2000.0]] * 3, vpvs=2.0)


def test_scalar_thickness_rejected():
    with pytest.raises(ValueError):
        LayerModel.build(10.0, [1000.0, 2000.0], vpvs=2.0)


def test_vs_or_vpvs_required_and_not_both():
    with pytest.raises(ValueError):
        LayerModel.build([10.0], [1000.0, 2000.0])
    with pytest.raises(ValueError):
        LayerModel.build([10.0], [1000.0, 2000.0], vs=[500.0, 1000.0], vpvs=2.0)


# ---------------------------------------------------------- Poisson limits
@pytest.mark.parametrize("ratio", [1.1, SQRT43])
def test_vpvs_at_or_below_sqrt43_rejected(ratio):
    _raises("vpvs", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vpvs=[ratio, 1.8])
    _raises("vpvs", "half-space", thickness=[10.0], vp=[1000.0, 2000.0], vpvs=[1.8, ratio])


def test_vs_too_large_for_a_solid_rejected():
    # 1000 / 900 = 1.11 < sqrt(4/3) = 1.1547
    _raises("vs", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vs=[900.0, 1000.0])


def test_vpvs_too_small_at_base_through_gradients():
    # top: 2000/1000 = 2; base (100 m down): 2000 / (1000 + 8*100) = 1.11 < 1.1547
    msg = _raises("vs", "layer 1", thickness=[100.0], vp=[2000.0, 3000.0], vs=[1000.0, 1700.0],
                  vs_gradient=[8.0, 0.0])
    assert "base" in msg


def test_vpvs_just_above_sqrt43_accepted():
    m = LayerModel.build([10.0], [1000.0, 2000.0], vpvs=[SQRT43 * (1 + 1e-9), 1.8])
    assert m.vpvs[0, 0] > SQRT43


# ------------------------------------------------------------------ fluids
def test_fluid_layer_accepted_with_vs_zero():
    m = LayerModel.build([1000.0], [1500.0, 3000.0], vs=[0.0, 1700.0])
    assert m.vs[0, 0] == 0.0 and m.vs_gradient[0, 0] == 0.0
    assert np.isinf(m.vpvs[0, 0]) and m.vpvs[0, 1] == pytest.approx(3000.0 / 1700.0)


def test_fluid_layer_accepted_with_vpvs_inf():
    m = LayerModel.build([1000.0], [1500.0, 3000.0], vpvs=[np.inf, 1.75], gradient=[0.01, 0.0])
    assert m.vs[0, 0] == 0.0 and m.vs_gradient[0, 0] == 0.0
    assert m.vs[0, 1] == pytest.approx(3000.0 / 1.75)


def test_fluid_with_s_gradient_rejected():
    _raises("vs_gradient", "layer 1", thickness=[1000.0], vp=[1500.0, 3000.0], vs=[0.0, 1700.0],
            vs_gradient=[0.1, 0.0])


def test_negative_vpvs_rejected():
    _raises("vpvs", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vpvs=[-2.0, 1.8])
    _raises("vpvs", "layer 1", thickness=[10.0], vp=[1000.0, 2000.0], vpvs=[-np.inf, 1.8])


# ----------------------------------------------------------------- queries
def test_profile_hand_values():
    m = LayerModel.build([100.0, 200.0], [1000.0, 2000.0, 3000.0], vpvs=2.0, gradient=[1.0, 0.5, 0.1])
    depths = [-50.0, 0.0, 50.0, 100.0, 200.0, 300.0, 1300.0]
    # layer 1 extends above the datum: 1000 + 1*(-50) = 950; 1000; 1000 + 50 = 1050;
    # 100 m is interface 1 -> layer 2 top 2000; 2000 + 0.5*100 = 2050;
    # 300 m is interface 2 -> half-space top 3000; 3000 + 0.1*1000 = 3100.
    expected_p = [950.0, 1000.0, 1050.0, 2000.0, 2050.0, 3000.0, 3100.0]
    np.testing.assert_allclose(m.profile(depths, "P")[0], expected_p, rtol=1e-14)
    # Vp/Vs = 2 everywhere (default vs_gradient = gradient * vs / vp keeps the ratio)
    np.testing.assert_allclose(m.profile(depths, "S")[0], np.array(expected_p) / 2, rtol=1e-14)
    assert m.profile(depths).shape == (1, len(depths))


def test_profile_batched_and_interfaces():
    m = LayerModel.build([[100.0, 200.0], [50.0, 50.0]], [1000.0, 2000.0, 3000.0], vpvs=1.8)
    np.testing.assert_allclose(m.interface_depths, [[100.0, 300.0], [50.0, 100.0]])
    np.testing.assert_allclose(m.layer_tops, [[0.0, 100.0, 300.0], [0.0, 50.0, 100.0]])
    prof = m.profile([75.0, 150.0], "P")
    # model 0: 75 m in layer 1, 150 m in layer 2; model 1: 75 m in layer 2, 150 m in the half-space
    np.testing.assert_allclose(prof, [[1000.0, 2000.0], [2000.0, 3000.0]])
    assert m.n_models == 2 and m.n_layers == 3
    one = m.take(1)
    assert one.n_models == 1
    np.testing.assert_allclose(one.thickness, [[50.0, 50.0]])


def test_base_velocity_hand_values():
    m = LayerModel.build([100.0, 200.0], [1000.0, 2000.0, 3000.0], vpvs=2.0, gradient=[1.0, -0.5, 0.1])
    # bases: 1000 + 100 = 1100; 2000 - 0.5*200 = 1900; half-space reports its top value
    np.testing.assert_allclose(m.base_velocity("P")[0], [1100.0, 1900.0, 3000.0])


def test_half_space_vpvs_falling_below_sqrt43_at_depth_rejected():
    # Vp = 3000 (constant), Vs = 1700 + 1.0 z: Vp/Vs = 3000/2598 = 1.1547 at z = 898 m and
    # Vs > Vp below z = 1300 m, inside the half-space (which starts at 100 m).
    _raises("vs", "half-space", thickness=[100.0], vp=[2000.0, 3000.0], vs=[1000.0, 1700.0],
            vs_gradient=[0.0, 1.0])
