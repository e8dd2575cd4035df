"""Monte Carlo against exact results (the checks behind ``sigmasim validate``).

Sources are written beside each check in :mod:`sigmasim.validation`; every
comparison passes within 4 sigma, sigma from Wolff's Gamma method.
"""

import pytest

from sigmasim import validation

ZERO_D = [
    # (nf, h, kappa, theta, group, placement)
    (1, 0.8, 0.5, 2.0, "U", "split"),
    (1, -1.5, 0.2, 3.1, "U", "mass"),
    (2, 1.1, 0.7, 2.5, "U", "anomaly"),
    (2, 0.5, 1.5, 3.14159, "U", "mass"),
    (3, -0.6, 0.9, 3.0, "U", "mass"),
    (3, 0.9, 0.4, 1.0, "U", "split"),
    (4, 0.7, 0.6, 2.0, "U", "anomaly"),
    (2, 1.3, 0.0, 1.0, "SU", "mass"),
    (3, 0.8, 0.0, 2.5, "SU", "mass"),
]


@pytest.mark.parametrize("algorithm", ["heatbath", "metropolis"])
@pytest.mark.parametrize("nf, h, kappa, theta, group, placement", ZERO_D)
def test_one_site_integrals(nf, h, kappa, theta, group, placement, algorithm):
    checks = validation.zero_dim(nf, h, kappa, theta, group=group, placement=placement,
                                 algorithm=algorithm)
    bad = [c for c in checks if not c.passed]
    assert not bad, validation.format_table(bad)


@pytest.mark.parametrize("algorithm", ["heatbath", "metropolis"])
def test_u1_chain_transfer_matrix(algorithm):
    checks = validation.u1_chain(algorithm=algorithm)
    bad = [c for c in checks if not c.passed]
    assert not bad, validation.format_table(bad)


def test_a_wrong_exact_value_fails():
    # the comparison can fail: the same data against a shifted reference
    c = validation.zero_dim(1, 0.8, 0.5, 2.0)[0]
    shifted = validation.Check(c.name, c.source, c.exact + 10 * c.error, c.value, c.error)
    assert not shifted.passed


@pytest.mark.slow
def test_o4_critical_ratio():
    checks = validation.o4_ratio()
    bad = [c for c in checks if not c.passed]
    assert not bad, validation.format_table(checks)
