"""The step registry is the one list of cleaning steps: everything else follows it."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from plexwash.qc.io import read_roi
from plexwash.qc.ledger import Ledger
from plexwash.qc.recipe import PER_CHANNEL, SECTION_ORDER, default_recipe, section_classes
from plexwash.qc.report import write_report
from plexwash.qc.spillover import read_spillover
from plexwash.qc.steps.registry import STEP_NAMES, STEPS, per_channel_steps, step
from plexwash.qc.wash import wash, wash_to_file


def test_order_and_declarations():
    assert STEP_NAMES == ("hot_pixels", "compensation", "speckle")  # read -> hot_pixels -> compensation -> speckle
    for s in STEPS:
        assert s.scope in ("plane", "pixels")
        fields = [f.name for f in dataclasses.fields(s.settings)]
        assert fields[0] == "enabled"
        assert all(f.metadata.get("doc") for f in dataclasses.fields(s.settings))
        assert step(s.name) is s
    assert [s.name for s in STEPS if s.scope == "pixels"] == ["compensation"]
    with pytest.raises(KeyError, match="no cleaning step"):
        step("nope")


def test_recipe_report_and_studio_follow_the_registry():
    classes = section_classes()
    assert tuple(classes)[:len(STEPS)] == STEP_NAMES
    assert all(classes[s.name] is s.settings for s in STEPS)
    assert SECTION_ORDER[:len(STEPS)] == STEP_NAMES
    assert {s.name for s in per_channel_steps()} == {n for n in PER_CHANNEL if n in STEP_NAMES}
    recipe = default_recipe()
    text = recipe.to_toml()
    for s in STEPS:
        assert getattr(recipe, s.name) == s.settings() == recipe.steps[s.name]
        assert f"# {s.title}\n[{s.name}]" in text


def test_report_sections_follow_the_registry(tmp_path):
    """The report's removed-signal table has one column per registry step, in its order,
    titled with the step's label, whatever order the ledger record lists them in."""
    Ledger(tmp_path / "ledger.jsonl").append(
        {"roi": "a", "status": "done", "channels": ["X1"],
         "removed_fraction": {s.name: {"X1": 0.1} for s in reversed(STEPS)}})
    page = write_report(tmp_path, thumbnail_rois=0).read_text(encoding="utf-8")
    removed = page[page.index('<section id="removed">'):]
    removed = removed[:removed.index("</section>")]
    where = [removed.index(f"<th>{s.label}: mean / max %</th>") for s in STEPS]
    assert where == sorted(where) and len(set(where)) == len(STEPS)


def test_stats_rows_carry_the_declared_numbers_in_both_washes(demo_dir, tmp_path):
    roi = read_roi(demo_dir / "cohort" / "roi_02.ome.tiff")
    roi = dataclasses.replace(roi, data=np.asarray(roi.data[:, :128, :128]))
    matrix = read_spillover(demo_dir / "truth" / "spillover.csv")
    recipe = default_recipe().with_channel("speckle", roi.channels[0], enabled=False)
    in_memory = wash(roi, recipe, spillover=matrix)
    staged = wash_to_file(roi, tmp_path / "w.ome.tiff", recipe, spillover=matrix).stats
    assert list(in_memory.stats) == list(staged) == list(STEP_NAMES)
    for s in STEPS:
        for row, other in zip(in_memory.stats[s.name], staged[s.name], strict=True):
            assert set(s.stats) <= set(row) and {"channel", "ran", "removed_fraction"} <= set(row)
            assert row.keys() == other.keys()
            assert row["removed_fraction"] == pytest.approx(other["removed_fraction"], rel=1e-6, abs=1e-12)


def test_a_recipe_pickles_and_copies_with_its_overrides():
    import copy
    import pickle

    recipe = default_recipe().with_channel("speckle", "Nd145", radius=3).replace("hot_pixels", flat_sigmas=2.0)
    for again in (pickle.loads(pickle.dumps(recipe)), copy.deepcopy(recipe)):
        assert again == recipe and again.sha256() == recipe.sha256()
        assert again.for_channel("speckle", "Nd145").radius == 3 and again.hot_pixels.flat_sigmas == 2.0
