"""The sample sheet: every kind of error is one line naming the file and line; nothing written."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.cli import main
from plexwash.qc.errors import InputError
from plexwash.qc.io import list_cohort, match_samples, read_samples, roi_id, write_ome_tiff
from plexwash.qc.quality import add_batch_outlier_flags, batch_differences, kruskal_wallis


@pytest.fixture
def cohort(tmp_path, small_stack):
    root = tmp_path / "cohort"
    for name in ("s1/a.ome.tiff", "s1/b.ome.tiff", "s2/a.ome.tiff"):
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        write_ome_tiff(root / name, small_stack, ["A", "B", "C"])
    return root


def _rois(root):
    return [(roi_id(p, root), p) for p in list_cohort(root)]


def _sheet(path, text):
    path.write_text(text, encoding="utf-8")
    return path


def test_sheet_is_read_with_extra_columns(cohort, tmp_path):
    sheet = _sheet(tmp_path / "s.csv", "file,batch,patient,date\ns1/a.ome.tiff,B1,P1,2026-01-02\n"
                   "./s1/b.ome.tiff,B1,P1,2026-01-02\ns2/a,B2,P2,2026-02-03\n")
    rows = match_samples(read_samples(sheet), _rois(cohort), cohort)
    assert rows == {"s1/a": {"batch": "B1", "patient": "P1", "date": "2026-01-02"},
                    "s1/b": {"batch": "B1", "patient": "P1", "date": "2026-01-02"},
                    "s2/a": {"batch": "B2", "patient": "P2", "date": "2026-02-03"}}


@pytest.mark.parametrize("text, message", [
    ("file,patient\ns1/a.ome.tiff,P1\n", r"s\.csv: line 1: missing column\(s\) batch"),
    ("file,batch,batch\ns1/a.ome.tiff,B1,B1\n", r"line 1: duplicate column\(s\) batch"),
    ("file,batch,sbr\ns1/a.ome.tiff,B1,3\n", r"line 1: column\(s\) sbr would shadow"),
    ("file,batch\n", r"no rows below the header"),
    ("file,batch\n,B1\n", r"line 2: empty file cell"),
    ("file,batch\ns1/a.ome.tiff,\n", r"line 2: s1/a.ome.tiff has no batch"),
    ("file,batch\ns1/a.ome.tiff,B1,extra\n", r"line 2: 3 cells, the header has 2"),
    ("file,batch\ns1/a.ome.tiff,B1\n\ns1/a.ome.tiff,B2\n", r"line 4: s1/a.ome.tiff is listed twice "
                                                            r"\(first on line 2\)"),
    ("file,batch,spillover\ns1/a.ome.tiff,B1,x.csv\ns1/b.ome.tiff,B1,y.csv\n",
     r"line 3: batch B1 names a second spillover matrix"),
])
def test_sheet_errors_name_file_and_line(tmp_path, text, message):
    with pytest.raises(InputError, match=message):
        read_samples(_sheet(tmp_path / "s.csv", text))


@pytest.mark.parametrize("text, message", [
    ("file,batch\ns1/a.ome.tiff,B1\ns1/b.ome.tiff,B1\ns3/z.ome.tiff,B2\ns2/a.ome.tiff,B2\n",
     r"line 4: s3/z.ome.tiff is not an ROI of the cohort"),
    ("file,batch\ns1/a.ome.tiff,B1\ns1/a,B1\ns1/b.ome.tiff,B1\ns2/a.ome.tiff,B2\n",
     r"line 3: s1/a is the ROI s1/a again \(first on line 2\)"),
    ("file,batch\ns1/a.ome.tiff,B1\n", r"2 ROI\(s\) of the cohort not listed: s1/b, s2/a"),
])
def test_sheet_and_cohort_must_agree(cohort, tmp_path, text, message):
    sheet = read_samples(_sheet(tmp_path / "s.csv", text))
    with pytest.raises(InputError, match=message):
        match_samples(sheet, _rois(cohort), cohort)


def test_cli_bad_sheet_exits_2_and_writes_nothing(cohort, tmp_path, capsys):
    sheet = _sheet(cohort / "samples.csv", "file,batch\ns1/a.ome.tiff,B1\nnope.ome.tiff,B1\n")
    out = tmp_path / "run"
    assert main(["run", str(cohort), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and f"{sheet}: line 3" in err and "\n" not in err
    assert not out.exists()
    given = _sheet(tmp_path / "other.csv", "file,batch\ns1/a.ome.tiff,B1\n")
    assert main(["run", str(cohort), "-o", str(out), "--quiet", "--samples", str(given)]) == 2
    assert "not listed: s1/b, s2/a" in capsys.readouterr().err
    assert not out.exists()


def test_cli_refuses_to_write_over_the_sheet(cohort, tmp_path, capsys):
    _sheet(cohort / "samples.csv", "file,batch\ns1/a.ome.tiff,B1\ns1/b.ome.tiff,B1\ns2/a.ome.tiff,B2\n")
    before = (cohort / "samples.csv").read_bytes()
    assert main(["recipe", "new", "-o", str(cohort / "samples.csv")]) == 2
    assert (cohort / "samples.csv").read_bytes() == before


# --------------------------------------------------------------------------- statistics


def test_kruskal_wallis_matches_scipy():
    from scipy.stats import kruskal

    rng = np.random.default_rng(5)
    cases = [
        [rng.normal(0, 1, 7), rng.normal(0.5, 1, 9), rng.normal(1, 1, 5)],
        [np.round(rng.normal(0, 1, 12)), np.round(rng.normal(1, 1, 10))],  # many ties
        [[1, 2, 3, 4], [5, 6, 7, 8]],
    ]
    for groups in cases:
        h, p = kruskal_wallis(*groups)
        reference = kruskal(*groups)  # reference: scipy.stats.kruskal
        assert h == pytest.approx(reference.statistic, rel=1e-10)
        assert p == pytest.approx(reference.pvalue, rel=1e-8)
    assert kruskal_wallis([2, 2, 2], [2, 2]) == (0.0, 1.0)
    with pytest.raises(InputError):
        kruskal_wallis([1, 2, 3])


def test_batch_differences_need_significance_and_size():
    rng = np.random.default_rng(2)
    rows = []
    for batch, shift in (("B1", 1.0), ("B2", 1.1), ("B3", 1.0)):
        for k in range(30):
            rows.append({"roi": f"{batch}-{k}", "channel": "CD3", "stage": "raw", "batch": batch,
                         "sbr": shift * rng.normal(10, 0.3)})
    found = batch_differences(rows, metrics=["sbr"])
    # clearly detectable (p tiny) but only 10 % apart: below the default 1.25 fold
    assert found[0]["p"] < 1e-6 and not found[0]["differs"]
    assert batch_differences(rows, metrics=["sbr"], fold=1.05)[0]["differs"]
    few = [r for r in rows if r["batch"] == "B1"] + [r for r in rows if r["batch"] == "B2"][:2]
    assert batch_differences(few, metrics=["sbr"]) == []  # B2 has too few ROIs


def test_outliers_within_batch():
    rows = [{"roi": f"{b}{k}", "channel": "CD3", "stage": "raw", "batch": b, "flags": [],
             "sbr": (40.0 if b == "B" else 10.0) + 0.1 * k} for b in "AB" for k in range(8)]
    rows[3]["sbr"] = 40.0  # ordinary for the cohort overall, far from the rest of batch A
    flagged = add_batch_outlier_flags(rows)
    assert [r["roi"] for r in flagged if "batch-outlier" in r["flags"]] == ["A3"]
    assert flagged[0]["sbr_batch_modified_z"] is not None
