"""The decay width of sequencer.physics against its definition with CODATA constants."""
import numpy as np
import pytest
import scipy.constants as C

from sequencer import physics as P


@pytest.mark.parametrize("F, phi", [(3e9, 4.5), (5e9, 4.5), (8e9, 5.0)])
def test_decay_width_from_codata(F, phi):
    # d_F = e hbar F / (2 (2 m_e phi)^(1/2) t(f)) (Murphy and Good 1956; Forbes 2008),
    # constants from CODATA via scipy.constants, result in eV.
    t = P.t_approx(P.scaled_field(F, phi))
    d_joule = C.e * C.hbar * F / (2.0 * np.sqrt(2.0 * C.m_e * phi * C.e) * t)
    assert P.decay_width(F, phi) == pytest.approx(d_joule / C.e, rel=1e-6)
    # order of magnitude of the trade: a few tenths of an eV at a few V/nm
    # (common practice, no source)
    assert 0.1 < P.decay_width(F, phi) < 0.5
