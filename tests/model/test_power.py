"""Tabulated linear P(k): reading, scaling, extension beyond the table, and errors for bad files."""

import numpy as np
import pytest
from astropy import units as u
from astropy.cosmology import units as cu
from astropy.table import Table

from pairvel.core.errors import InputError
from pairvel.model import theory as th
from pairvel.model.cosmology import DEFAULT_COSMOLOGY
from pairvel.model.power import read_power_table

C = DEFAULT_COSMOLOGY
R = np.array([10.0, 20.0, 40.0, 60.0, 80.0, 100.0, 150.0])


def write_text(path, k, pk, header="# k [1/Mpc]  P [Mpc^3]\n"):
    path.write_text(header + "".join(f"{a:.10e} {b:.10e}\n" for a, b in zip(k, pk)))
    return path


def test_table_of_eh98_reproduces_eh98(tmp_path):
    """Internal consistency: EH98 written to a table (1e-4..50 /Mpc) and read back gives the same xi,
    xibar and v12 as EH98 itself on 10-150 Mpc (only log-log interpolation between 600 points differs)."""
    k = np.geomspace(1e-4, 50, 600)
    tab = read_power_table(write_text(tmp_path / "pk.txt", k, th.linear_power(k)))
    np.testing.assert_allclose(th.linear_power([0.01, 0.1, 0.3], power=tab), th.linear_power([0.01, 0.1, 0.3]),
                               rtol=1e-3)  # log-log interpolation on a 0.022 step in ln k
    xi_ref = th.correlation_function(R)
    np.testing.assert_allclose(th.correlation_function(R, power=tab), xi_ref, rtol=2e-3, atol=2e-3 * np.abs(xi_ref).max())
    np.testing.assert_allclose(th.pairwise_velocity(R, 0.4, 1.5, power=tab), th.pairwise_velocity(R, 0.4, 1.5),
                               rtol=2e-3)


def test_table_redshift_and_renormalisation(tmp_path):
    """Analytic: a table at z = 1 equal to D(1)^2 P(k, 0) gives the z = 0 spectrum back; a table with
    twice the amplitude, renormalised, has sigma(8/h Mpc) = sigma_8 again."""
    k = np.geomspace(1e-4, 50, 600)
    d1 = th.growth_factor(1.0)
    at_z1 = read_power_table(write_text(tmp_path / "z1.txt", k, d1**2 * th.linear_power(k)), z=1.0)
    np.testing.assert_allclose(th.linear_power([0.05, 0.2], power=at_z1), th.linear_power([0.05, 0.2]), rtol=1e-3)
    Table({"k": k, "pk": th.linear_power(k)}).write(tmp_path / "nounit.ecsv", format="ascii.ecsv")
    np.testing.assert_allclose(read_power_table(tmp_path / "nounit.ecsv").pk, th.linear_power(k), rtol=1e-12)
    twice = write_text(tmp_path / "x2.txt", k, 2 * th.linear_power(k))
    np.testing.assert_allclose(th.sigma_radius(8 / C.h, power=read_power_table(twice)), np.sqrt(2) * C.sigma_8,
                               rtol=1e-3)
    np.testing.assert_allclose(th.sigma_radius(8 / C.h, power=read_power_table(twice, renormalise=True)), C.sigma_8,
                               rtol=1e-6)


def test_extension_beyond_a_short_table_is_harmless(tmp_path):
    """Internal check of the coverage rule: a table that just covers the required 1e-3..2 /Mpc, extended
    by power laws, changes xi on 10-150 Mpc by < 1% of the peak |xi| in that range."""
    k_full = np.geomspace(1e-4, 50, 600)
    k_short = np.geomspace(1e-3, 2.0, 200)
    full = read_power_table(write_text(tmp_path / "full.txt", k_full, th.linear_power(k_full)))
    short = read_power_table(write_text(tmp_path / "short.txt", k_short, th.linear_power(k_short)))
    a, b = th.correlation_function(R, power=full), th.correlation_function(R, power=short)
    assert np.max(np.abs(a - b)) < 0.01 * np.max(np.abs(a))


def test_table_against_colossus(tmp_path):
    """Outside reference: the general-purpose toolkit colossus (test-only extra) makes the P(k) table
    (its EH98 model, converted from h units) and computes xi(r) from it with its own integrator; our
    FFTLog xi of the same table agrees to 1% (plus 1e-4 absolute near the zero crossing) on 10-100 Mpc,
    and the ECSV reader converts astropy littleh units."""
    cosmology = pytest.importorskip("colossus.cosmology.cosmology")
    cc = cosmology.setCosmology("pairvel-table-test", params={"flat": True, "H0": 100 * C.h, "Om0": C.omega_m,
                                "Ob0": C.omega_b, "sigma8": C.sigma_8, "ns": C.n_s, "Tcmb0": C.t_cmb_k,
                                "relspecies": False}, persistence="")
    kh = np.geomspace(1e-4, 40, 800)  # h/Mpc
    pk_h = cc.matterPowerSpectrum(kh, z=0.0, model="eisenstein98")  # (Mpc/h)^3
    t = Table({"k": kh * cu.littleh / u.Mpc, "pk": pk_h * (u.Mpc / cu.littleh) ** 3})
    t.write(tmp_path / "pk.ecsv", format="ascii.ecsv")
    tab = read_power_table(tmp_path / "pk.ecsv", h=C.h)
    np.testing.assert_allclose(tab.k, kh * C.h, rtol=1e-12)
    np.testing.assert_allclose(tab.pk, pk_h / C.h**3, rtol=1e-12)
    r = np.array([10.0, 20.0, 30.0, 60.0, 80.0, 100.0])
    theirs = cc.correlationFunction(r * C.h, z=0.0, ps_args={"model": "eisenstein98"})
    np.testing.assert_allclose(th.correlation_function(r, power=tab), theirs, rtol=0.01, atol=1e-4)


def test_bad_tables(tmp_path):
    k = np.geomspace(1e-4, 50, 50)
    pk = th.linear_power(k)
    with pytest.raises(InputError, match="file not found"):
        read_power_table(tmp_path / "none.txt")
    (tmp_path / "three.txt").write_text("0.1 2.0 3.0\n")
    with pytest.raises(InputError, match="line 1 must hold two numbers"):
        read_power_table(tmp_path / "three.txt")
    (tmp_path / "word.txt").write_text("# header\n0.1 abc\n")
    with pytest.raises(InputError, match="line 2 is not numeric"):
        read_power_table(tmp_path / "word.txt")
    (tmp_path / "empty.txt").write_text("# nothing\n")
    with pytest.raises(InputError, match="no data rows"):
        read_power_table(tmp_path / "empty.txt")
    neg = pk.copy()
    neg[7] = -1.0
    with pytest.raises(InputError, match=r"column P must be finite and > 0; 1 rows are not \(first: row 7"):
        read_power_table(write_text(tmp_path / "neg.txt", k, neg))
    kk = k.copy()
    kk[10] = kk[9]
    with pytest.raises(InputError, match="k must increase strictly; row 10"):
        read_power_table(write_text(tmp_path / "dup.txt", kk, pk))
    with pytest.raises(InputError, match=r"must cover k from <= 0.001 to >= 2 1/Mpc.*h/Mpc"):
        read_power_table(write_text(tmp_path / "short.txt", np.geomspace(0.01, 1, 50), pk))
    flat = pk.copy()
    flat[k > 5] = flat[k > 5][0]
    with pytest.raises(InputError, match="must fall at least as steeply as k\\^-1.5"):
        read_power_table(write_text(tmp_path / "flat.txt", k, flat))
    Table({"kk": k, "pk": pk}).write(tmp_path / "cols.ecsv", format="ascii.ecsv")
    with pytest.raises(InputError, match=r"must have columns 'k' and 'pk'; missing \['k'\]"):
        read_power_table(tmp_path / "cols.ecsv")
    Table({"k": k * u.s, "pk": pk}).write(tmp_path / "unit.ecsv", format="ascii.ecsv")
    with pytest.raises(InputError, match="column 'k' has unit 's'"):
        read_power_table(tmp_path / "unit.ecsv")
    (tmp_path / "junk.ecsv").write_text("not an ecsv\n")
    with pytest.raises(InputError, match="not a readable ECSV table"):
        read_power_table(tmp_path / "junk.ecsv")
