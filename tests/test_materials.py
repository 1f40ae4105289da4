"""Material models against published formulas and tables."""

import numpy as np
import pytest

from metalay.cells.materials import get_material, malitson_silica_index
from metalay.errors import MaterialError


def test_fused_silica_nd_line():
    # Source: Malitson 1965, J. Opt. Soc. Am. 55, 1205 (n_d = 1.4585 at the helium d line, 587.6 nm)
    assert abs(get_material("SiO2").index(587.6).real - 1.4585) < 1e-4


def test_fused_silica_formula_matches_database_page():
    # Source: Malitson 1965, J. Opt. Soc. Am. 55, 1205, tabulated in refractiveindex.info main/SiO2/Malitson
    wl = np.array([300.0, 532.0, 633.0, 1064.0, 1550.0])
    ours = malitson_silica_index(wl)
    db = get_material("SiO2-database").index(wl).real
    assert np.max(np.abs(ours - db)) < 1e-6
    # Source: Malitson 1965, J. Opt. Soc. Am. 55, 1205 (table of measured indices): n = 1.45702 at 632.8 nm
    assert abs(malitson_silica_index(632.8) - 1.45702) < 2e-5


def test_magnesium_fluoride_ordinary():
    # Source: Dodge 1984, Appl. Opt. 23, 1980: n_o = 1.3777 at 589.3 nm (From memory: handbook value 1.3777)
    assert abs(get_material("MgF2").index(589.3).real - 1.3777) < 5e-4


def test_silicon_near_infrared():
    # Source: Li 1980, J. Phys. Chem. Ref. Data 9, 561: n(Si, 293 K, 1550 nm) = 3.4757 (refractiveindex.info table)
    assert abs(get_material("Si").index(1550.0).real - 3.4757) < 1e-3


def test_gold_rakic_is_a_lossy_metal():
    # Source: Rakic et al. 1998, Appl. Opt. 37, 5271 (Lorentz-Drude): at 1550 nm Re(eps) ~ -90..-110, Im(eps) > 0
    # (From memory: Johnson and Christy 1972 give n ~ 0.52 + 10.7i there, i.e. eps ~ -114 + 11i)
    eps = get_material("Au").epsilon(1550.0)
    assert -130 < eps.real < -80 and eps.imag > 0


def test_constants_and_aliases():
    assert get_material("n=2.0").index([500.0, 600.0]).tolist() == [2.0, 2.0]
    assert get_material("air").index(500.0) == 1.0
    assert get_material("fused_silica").name == "SiO2"


def test_user_table_interpolation_and_range(tmp_path):
    p = tmp_path / "m.csv"
    p.write_text("wavelength_nm,n,k\n500,2.0,0.0\n600,2.2,0.1\n")
    m = get_material(f"table:{p}")
    assert abs(m.index(550.0) - (2.1 + 0.05j)) < 1e-12
    with pytest.raises(MaterialError, match="outside"):
        m.index(650.0)
    bad = tmp_path / "bad.csv"
    bad.write_text("wl,n,k\n500,2,0\n")
    with pytest.raises(MaterialError, match="header"):
        get_material(f"table:{bad}")
    dec = tmp_path / "dec.csv"
    dec.write_text("wavelength_nm,n,k\n600,2,0\n500,2,0\n")
    with pytest.raises(MaterialError, match="increasing"):
        get_material(f"table:{dec}")


def test_range_and_unknown_errors():
    with pytest.raises(MaterialError, match="outside"):
        get_material("Si").index(500.0)          # Li 1980 data start at 1200 nm
    with pytest.raises(MaterialError, match="unknown material"):
        get_material("unobtainium")
    with pytest.raises(MaterialError):
        get_material("n=-1")
