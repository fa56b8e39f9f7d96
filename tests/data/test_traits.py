"""Trait tables: reading, reducing specimens, standard errors, rejections.

References: the specimen reduction is checked against pandas and scipy.stats
(mean, sample variance with ddof=1, scipy.stats.sem); se = sd / sqrt(n) is the
textbook standard error of a mean; the log-scale standard error by the delta method
se(log x) = se(x) / x is first-order error propagation (e.g. Lynch & Walsh 1998,
Genetics and Analysis of Quantitative Traits, appendix A1, from memory).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from cladewise.errors import InputError
from cladewise.data.traits import read_species_table, read_specimen_table, read_traits

SPECIMENS = """# invented test data
species,code,mass,length
A a,s1,10.0,3
A a,s2,12.0,4
A a,s3,11.0,
B b,s4,20.0,6
C c,s5,5.0,2
C c,s6,7.0,2.5
"""


def test_specimen_reduction_matches_pandas_scipy(tmp_path):
    path = tmp_path / "spec.csv"
    path.write_text(SPECIMENS)
    td = read_specimen_table(path)
    assert td.species == ["A a", "B b", "C c"]
    assert td.traits == ["mass", "length"]
    raw = pd.read_csv(path, comment="#")
    for i, sp in enumerate(td.species):
        for j, t in enumerate(td.traits):
            v = raw.loc[raw.species == sp, t].dropna().to_numpy()
            assert td.mean[i, j] == pytest.approx(v.mean())
            assert td.n[i, j] == len(v)
            if len(v) >= 2:
                assert td.within_var[i, j] == pytest.approx(np.var(v, ddof=1))
                assert td.se[i, j] == pytest.approx(stats.sem(v))  # scipy: ddof=1
            else:
                assert np.isnan(td.within_var[i, j]) and np.isnan(td.se[i, j])
    assert len(td.specimens) == 6
    assert list(td.extra.columns) == ["code"]


def test_specimen_log_before_reducing(tmp_path):
    path = tmp_path / "spec.csv"
    path.write_text(SPECIMENS)
    td = read_specimen_table(path, log=["mass"])
    v = np.log([10.0, 12.0, 11.0])
    assert td.column("mass")[0] == pytest.approx(v.mean())
    assert td.se[0, 0] == pytest.approx(stats.sem(v))
    assert td.log_traits == ["mass"]
    np.testing.assert_allclose(td.specimens["mass"].to_numpy()[:3], v)


def test_species_table_se_from_sd_and_n(tmp_path):
    path = tmp_path / "sp.tsv"
    path.write_text(
        "species\tmass\tmass_sd\tmass_n\tlength\tlength_se\n"
        "A\t10\t2\t4\t3\t0.1\nB\t20\t3\t9\tNA\t\nC\t30\t\t\t5\t0.2\n"
    )
    td = read_species_table(path)
    assert td.traits == ["mass", "length"]
    np.testing.assert_allclose(td.se[:2, 0], [2 / np.sqrt(4), 3 / np.sqrt(9)])  # se = sd/sqrt(n)
    assert np.isnan(td.se[2, 0]) and np.isnan(td.mean[1, 1]) and np.isnan(td.se[1, 1])
    np.testing.assert_allclose(td.n[:2, 0], [4, 9])


def test_species_table_log_delta_method(tmp_path):
    path = tmp_path / "sp.csv"
    path.write_text("taxon,mass,mass_SE\nA,10,1\nB,20,4\n")
    td = read_species_table(path, species="taxon", log=["mass"], se_suffix="_SE")
    np.testing.assert_allclose(td.mean[:, 0], np.log([10, 20]))
    np.testing.assert_allclose(td.se[:, 0], [0.1, 0.2])  # delta method: se / mean


def test_sniffing_unknown_extension(tmp_path):
    path = tmp_path / "sp.txt"
    path.write_text("species;x\nA;1\nB;2\n")
    assert read_traits(path).column("x").tolist() == [1.0, 2.0]


def test_subset_select_order(tmp_path):
    path = tmp_path / "spec.csv"
    path.write_text(SPECIMENS)
    td = read_specimen_table(path)
    s = td.subset(["C c", "A a"]).select(["length"])
    assert s.species == ["C c", "A a"] and s.traits == ["length"]
    np.testing.assert_allclose(s.mean[:, 0], [2.25, 3.5])
    assert set(s.specimens["species"]) == {"C c", "A a"}


@pytest.mark.parametrize(
    "text, kwargs, words",
    [
        ("species,x\nA,1\nB,abc\n", {}, ["non-numeric", "'abc'", "line 3", "'x'"]),
        ("species,x\nA,1\nB,inf\n", {}, ["infinite", "line 3"]),
        ("species,x,x_se\nA,1,0\nB,2,0.1\n", {}, ["standard error", "positive", "line 2"]),
        ("species,x,x_se\nA,1,-1\nB,2,0.1\n", {}, ["standard error"]),
        ("species,x\nA,1\nB,0\n", {"log": ["x"]}, ["log", "'x'", "line 3"]),
        ("species,x,y\nA,1,\nB,2,\n", {}, ["'y' has no values"]),
        ("name,x\nA,1\nB,2\n", {}, ["no species column 'species'"]),
        ("Species,x\nA,1\nB,2\n", {}, ["Did you mean 'Species'"]),
        ("species,x\nA,1\nB,2\nA,3\n", {}, ["more than once", "'A' at lines 2, 4"]),
        ("species,x\nA,1\nB,2\n", {"log": ["z"]}, ["'z'"]),
        ("species,x,x_n\nA,1,0\nB,2,3\n", {}, ["whole numbers"]),
    ],
)
def test_species_table_rejections(tmp_path, text, kwargs, words):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        read_species_table(path, **kwargs)
    for w in words:
        assert w in str(err.value)


def test_specimen_rejections(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("species,x\nA,1\nA,-2\n")
    with pytest.raises(InputError, match="log"):
        read_specimen_table(path, log=["x"])
    path.write_text("species,x\nA,1\n,2\n")
    with pytest.raises(InputError, match="empty species name at line 3"):
        read_specimen_table(path)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_traits(tmp_path / "none.csv")
