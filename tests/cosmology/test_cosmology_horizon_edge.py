"""Reachability at the event-horizon redshift itself.

An object exactly on our event horizon today (D_C(z) = D_EH) is not reachable: a signal
sent now approaches it only as t -> infinity (the event horizon is the boundary of the
region light emitted now can ever reach; Rindler 1956, MNRAS 116, 662; Davis &
Lineweaver 2004, PASA 21, 97, sec. 2).  So ``reachable`` is a strict inequality.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from annotator.cosmology import Cosmology, preset


@pytest.mark.parametrize("cosmo", [
    preset("textbook"),
    # de Sitter limit: z_EH = 1 (D_C = c z / H0 reaches the horizon c / H0 at z = 1)
    Cosmology(h0=70.0, omega_m=1e-12),
], ids=["textbook", "de_sitter_limit"])
def test_reachable_is_strict_at_the_event_horizon(cosmo):
    zeh = cosmo.derived()["event_horizon_redshift"]
    below, above = np.nextafter(zeh, 0.0), np.nextafter(zeh, math.inf)
    assert bool(cosmo.reachable(zeh)) is False
    assert bool(cosmo.reachable(above)) is False
    assert bool(cosmo.reachable(below)) is True
    got = cosmo.reachable(np.array([0.0, below, zeh, above]))
    assert got.tolist() == [True, True, False, False]


def test_de_sitter_limit_horizon_redshift_is_one():
    # closed form (de Sitter: D_EH = c / H0 = D_C(z = 1)); Omega_m = 1e-12 moves it by < 1e-8
    assert Cosmology(h0=70.0, omega_m=1e-12).derived()["event_horizon_redshift"] == (
        pytest.approx(1.0, rel=1e-8))
