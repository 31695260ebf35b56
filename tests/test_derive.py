"""Tests of `brushes.kernels.derive`: the sympy derivation, its proofs and the generator of `_generated.py`.

The formulas are checked against their published form (de Goes & James, "Regularized Kelvinlets",
ACM Trans. Graph. 36(4), 2017, cited below as [dGJ17]) written out again here by hand, not taken
from the module under test.
"""
import math
import pathlib

import numpy as np
import pytest
import sympy as sp
from scipy import integrate

from brushes.kernels import derive

KERNELS_FILE = pathlib.Path(derive.__file__).with_name("_generated.py")


def paper_density(r, eps):
    # [dGJ17] eq. 8: rho_eps(r) = 15 eps^4 / (8 pi (r^2 + eps^2)^(7/2)).
    return 15.0 * eps**4 / (8.0 * math.pi * (r * r + eps * eps) ** 3.5)


def paper_kelvinlet(r, eps, mu, nu):
    # [dGJ17] eq. 9: K_eps(r) = [(a - b)/r_eps + a eps^2/(2 r_eps^3)] I + b/r_eps^3 r r^T,
    # a = 1/(4 pi mu), b = a/(4 (1 - nu)), r_eps = sqrt(|r|^2 + eps^2).
    a = 1.0 / (4.0 * math.pi * mu)
    b = a / (4.0 * (1.0 - nu))
    re = math.sqrt(float(r @ r) + eps * eps)
    return ((a - b) / re + a * eps**2 / (2 * re**3)) * np.eye(3) + b / re**3 * np.outer(r, r)


def test_every_proof_passes():
    # The exact symbolic proofs (Navier-Cauchy for grab and affine loads, Jacobians, incompressibility,
    # centre constants, far-field cancellation). About 10-20 s on two shared cores.
    assert derive.run_proofs(verbose=False) is True


def test_generated_file_matches_committed_text():
    # House rule: generated code is never edited by hand; the generator is the source of truth.
    assert derive.generate() == KERNELS_FILE.read_text(encoding="utf-8")


def test_proof_helper_can_fail():
    # Negative control: the exact sample-point check rejects an expression that is not zero.
    assert derive._zero_at_samples(lambda e, n: [derive.x * derive.y - e]) is False
    assert derive._zero_at_samples(lambda e, n: [(derive.x - derive.x) * e]) is True


def test_far_field_proof_rejects_wrong_weights():
    # Negative control: weights that do not cancel the eps^0 term leave a 1/r tail, so the
    # medium falloff's r^-3 claim must be refused.
    ratios = derive.FALLOFF_RATIOS["medium"]
    assert derive.prove_far_field(ratios, (sp.Integer(1), sp.Rational(-9, 10))) is False
    assert derive.prove_far_field(ratios, derive.multiscale_weights(ratios)) is True


@pytest.mark.parametrize("eps", [0.05, 1.0, 7.5])
def test_load_density_integrates_to_one(eps):
    # [dGJ17] sec. 3: the regularized load is a unit point load spread by rho_eps, so
    # integral over R^3 of rho_eps = 1; checked with scipy's adaptive quadrature of 4 pi r^2 rho(r).
    rho = sp.lambdify((derive.x, derive.eps), derive.load_density().subs({derive.y: 0, derive.z: 0}), "math")
    total, err = integrate.quad(lambda r: 4.0 * math.pi * r * r * rho(r, eps), 0.0, math.inf,
                                epsabs=0.0, epsrel=1e-12, limit=200)
    assert total == pytest.approx(1.0, rel=1e-9)
    # the symbolic density is the paper's eq. 8, written out by hand above
    for r in (0.0, 0.3 * eps, eps, 4.0 * eps):
        assert rho(r, eps) == pytest.approx(paper_density(r, eps), rel=1e-14)


def test_kelvinlet_matrix_is_the_papers_eq_9():
    K = derive.kelvinlet_matrix()
    fn = sp.lambdify((derive.x, derive.y, derive.z, derive.eps, derive.mu, derive.nu), K, "numpy")
    rng = np.random.default_rng(7)
    for _ in range(5):
        r = rng.normal(size=3)
        eps, mu, nu = rng.uniform(0.1, 2.0), rng.uniform(0.2, 3.0), rng.uniform(-0.9, 0.5)
        np.testing.assert_allclose(np.array(fn(*r, eps, mu, nu), dtype=float), paper_kelvinlet(r, eps, mu, nu),
                                   rtol=1e-13, atol=0)


def test_center_constants_by_hand():
    # Hand evaluation of [dGJ17] eq. 9 and its gradient at r = 0 (s = eps), per unit a:
    # A(s) = (1 - beta)/s + eps^2/(2 s^3)            -> A(eps) = (3/2 - beta)/eps           (grab)
    # P = A'(s)/s = -(1 - beta)/s^3 - 3 eps^2/(2 s^5) -> P(eps) = (beta - 5/2)/eps^3
    # Q = B = beta/s^3                                -> Q(eps) = beta/eps^3
    # twist P - Q = -5/(2 eps^3); pinch P + Q = (4 beta - 5)/(2 eps^3); scale P + 4Q = 5 (2 beta - 1)/(2 eps^3).
    c = derive.center_constants()
    e, b = derive.eps, derive.beta
    hand = {
        "grab": (sp.Rational(3, 2) - b) / e,
        "twist": -sp.Rational(5, 2) / e**3,
        "pinch": (4 * b - 5) / (2 * e**3),
        "scale": sp.Rational(5, 2) * (2 * b - 1) / e**3,
    }
    assert set(c) == set(hand)
    for kind, expr in hand.items():
        assert sp.simplify(c[kind] - expr) == 0, kind


def test_multiscale_weights_by_hand():
    # Far from the centre each profile expands as c0(r) + c1(r) eps^2 + ...; with radii eps q_i the
    # weights solve sum w_i q_i^(2k) = 0 for k < K-1, w_0 = 1 ([dGJ17] sec. 5). By hand:
    # medium q = (1, 3/2): w = (1, -1). tight q = (1, 3/2, 9/4): w1 + w2 = -1 and
    # (9/4) w1 + (81/16) w2 = -1 give w2 = 4/9, w1 = -13/9.
    assert derive.multiscale_weights(derive.FALLOFF_RATIOS["wide"]) == (1,)
    assert derive.multiscale_weights(derive.FALLOFF_RATIOS["medium"]) == (1, -1)
    assert derive.multiscale_weights(derive.FALLOFF_RATIOS["tight"]) == (1, sp.Rational(-13, 9), sp.Rational(4, 9))


def test_affine_profiles_are_the_kelvinlet_gradient():
    # The profile form u = a [P F r + Q (F^T r + tr F r) + S (r.F r) r] must equal the contraction
    # u_i = sum_jk d_k K_ij F_jk of eq. 9 ([dGJ17] sec. 4); here checked numerically against central
    # differences of the hand-written eq. 9 above, at a random point and load.
    P, Q, S = (sp.lambdify((derive.s, derive.eps, derive.beta), p, "math") for p in derive.affine_profiles())
    rng = np.random.default_rng(3)
    r, F = rng.normal(size=3), rng.normal(size=(3, 3))
    eps, mu, nu = 0.8, 1.3, 0.2
    a, beta = 1 / (4 * math.pi * mu), 1 / (4 * (1 - nu))
    h = 1e-4
    dK = [(paper_kelvinlet(r + h * np.eye(3)[k], eps, mu, nu) - paper_kelvinlet(r - h * np.eye(3)[k], eps, mu, nu))
          / (2 * h) for k in range(3)]
    ref = sum(dK[k] @ F[:, k] for k in range(3))
    s = math.sqrt(r @ r + eps * eps)
    got = a * (P(s, eps, beta) * F @ r + Q(s, eps, beta) * (F.T @ r + np.trace(F) * r)
               + S(s, eps, beta) * (r @ F @ r) * r)
    np.testing.assert_allclose(got, ref, rtol=1e-7)


def test_publish_writes_whole_files_and_compares_them(tmp_path, capsys):
    # The one write/compare step of every generator (derive, dynamic_derive, flow_derive).
    import time
    from brushes.kernels import derive
    path = str(tmp_path / "_made.py")
    t0 = time.perf_counter()
    assert not derive.publish(path, "x = 1\n", write=False, proved=True, program="t", t0=t0)  # no file yet
    assert not derive.publish(path, "x = 1\n", write=True, proved=False, program="t", t0=t0)
    assert not (tmp_path / "_made.py").exists() and "a proof failed" in capsys.readouterr().err
    assert derive.publish(path, "x = 1\n", write=True, proved=True, program="t", t0=t0)
    assert (tmp_path / "_made.py").read_text() == "x = 1\n" and not (tmp_path / "_made.py.tmp").exists()
    assert derive.publish(path, "x = 1\n", write=False, proved=True, program="t", t0=t0)
    assert not derive.publish(path, "x = 2\n", write=False, proved=True, program="t", t0=t0)
    assert not derive.publish(path, "x = 1\n", write=False, proved=False, program="t", t0=t0)
    assert "DIFFERS FROM _made.py" in capsys.readouterr().out
