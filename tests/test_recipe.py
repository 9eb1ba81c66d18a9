"""Recipes: defaults, TOML round trip, per-channel overrides, validation errors, hashing."""

from __future__ import annotations

import dataclasses
import tomllib

import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.recipe import (
    SECTION_ORDER,
    default_recipe,
    load_recipe,
    recipe_from_dict,
    section_classes,
    write_recipe,
)


def test_default_recipe_written_with_comments_reads_back_identically(tmp_path):
    path = write_recipe(tmp_path / "recipe.toml")
    text = path.read_text()
    for section in SECTION_ORDER:
        assert f"[{section}]" in text
    assert text.count("# ") > 20  # every setting carries its doc and allowed range
    assert "allowed:" in text
    parsed = tomllib.loads(text)  # Python's own TOML parser is the reference for validity
    assert set(parsed) == set(SECTION_ORDER)
    for section in ("hot_pixels", "compensation", "speckle", "output"):  # contract: each has enabled
        assert "enabled" in parsed[section]
    assert load_recipe(path) == dataclasses.replace(default_recipe(), source=path)
    assert load_recipe(path).sha256() == default_recipe().sha256()


def test_every_setting_has_doc_and_a_default_within_its_range():
    """Each default checked here against its declared range and choices (not through the
    recipe's own validator, which could share a mistake with the declaration)."""
    checked = 0
    for cls in section_classes().values():
        for field in dataclasses.fields(cls):
            meta, value, name = field.metadata, field.default, f"{cls.__name__}.{field.name}"
            assert meta.get("doc"), f"{name} has no doc"
            if meta.get("choices"):
                assert value in meta["choices"], name
                checked += 1
            if meta.get("low") is not None:
                assert value > meta["low"] if meta["low_open"] else value >= meta["low"], name
                checked += 1
            if meta.get("high") is not None:
                assert value < meta["high"] if meta["high_open"] else value <= meta["high"], name
                checked += 1
    assert checked >= 20  # the ranges are declared, not missing
    assert recipe_from_dict({}) == default_recipe()  # and the validator accepts them


def test_per_channel_overrides(tmp_path):
    path = tmp_path / "r.toml"
    path.write_text(
        "[speckle]\nradius = 3\n"
        "[speckle.channels.Nd145]\nradius = 5\n"
        "[speckle.channels.Gd155]\nenabled = false\n"
        "[hot_pixels.channels.Ir191]\nratio = 8.0\n"
    )
    recipe = load_recipe(path)
    assert recipe.speckle.radius == 3
    assert recipe.for_channel("speckle", "Nd145").radius == 5
    assert recipe.for_channel("speckle", "Gd155").enabled is False
    assert recipe.for_channel("speckle", "Gd155").radius == 3  # global value carried over
    assert recipe.for_channel("speckle", "Sm147").radius == 3
    assert recipe.for_channel("hot_pixels", "Ir191").ratio == 8.0
    again = tmp_path / "again.toml"
    write_recipe(again, recipe)
    assert load_recipe(again).sha256() == recipe.sha256()
    assert load_recipe(again).for_channel("speckle", "Nd145").radius == 5


def test_overrides_naming_unknown_channels_refused(tmp_path):
    path = tmp_path / "r.toml"
    path.write_text("[speckle.channels.Xx999]\nradius = 5\n")
    recipe = load_recipe(path)
    with pytest.raises(InputError) as info:
        recipe.check_channels(["Nd145", "Ir191"], roi="roi_01.ome.tiff")
    assert "Xx999" in str(info.value) and "roi_01.ome.tiff" in str(info.value)


def test_hash_ignores_comments_and_order_but_not_values(tmp_path):
    a = tmp_path / "a.toml"
    b = tmp_path / "b.toml"
    a.write_text("[speckle]\nradius = 3\nalpha = 0.01\n")
    b.write_text("# a comment\n[speckle]\nalpha = 0.01\n\nradius = 3\n")
    assert load_recipe(a).sha256() == load_recipe(b).sha256()
    b.write_text("[speckle]\nalpha = 0.01\nradius = 4\n")
    assert load_recipe(a).sha256() != load_recipe(b).sha256()


def test_replace_and_with_channel_validate():
    recipe = default_recipe().replace("speckle", radius=4).with_channel("speckle", "Nd145", radius=6)
    assert recipe.speckle.radius == 4
    assert recipe.for_channel("speckle", "Nd145").radius == 6
    with pytest.raises(InputError, match="out of range"):
        default_recipe().replace("speckle", radius=0)
    with pytest.raises(InputError, match="per channel only cofactor"):  # [output]: the arcsinh cofactor only
        default_recipe().with_channel("output", "Nd145", tile=256)
    assert default_recipe().with_channel("output", "Nd145", cofactor=2.0).for_channel("output", "Nd145").cofactor == 2.0
    with pytest.raises(InputError, match="no per-channel"):
        default_recipe().with_channel("audit", "Nd145", alpha=0.05)


@pytest.mark.parametrize("text, fragment", [
    ("[speckle\nradius = 3\n", "malformed TOML"),
    ("[speckle]\nradios = 3\n", "unknown key speckle.radios"),
    ("[specks]\nradius = 3\n", "unknown recipe section [specks]"),
    ("[speckle]\nradius = 'three'\n", "speckle.radius must be a whole number"),
    ("[speckle]\nradius = 0\n", "speckle.radius = 0 is out of range; allowed: >= 1"),
    ("[speckle]\nenabled = 1\n", "speckle.enabled must be true or false"),
    ("[output]\nformat = 'png'\n", "output.format = 'png' is not allowed"),
    ("[hot_pixels]\nratio = nan\n", "hot_pixels.ratio must be finite"),
    ("[output.channels.Nd145]\ntile = 256\n", "unknown key output.channels.Nd145.tile: per channel only cofactor"),
    ("[audit.channels.Nd145]\nalpha = 0.1\n", "has no per-channel settings"),
    ("[speckle.channels.Nd145]\nwindow = 3\n", "unknown key speckle.channels.Nd145.window"),
])
def test_bad_recipes_name_the_key_and_range(tmp_path, text, fragment):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        load_recipe(path)
    assert fragment in str(info.value)
    assert str(info.value).startswith(str(path))


def test_missing_recipe_file(tmp_path):
    with pytest.raises(InputError, match="recipe file not found"):
        load_recipe(tmp_path / "nope.toml")


def test_spillover_path_resolves_against_recipe_folder(tmp_path):
    sub = tmp_path / "settings"
    sub.mkdir()
    path = sub / "r.toml"
    path.write_text("[compensation]\nspillover = 'spill.csv'\n")
    assert load_recipe(path).spillover_path() == sub / "spill.csv"
    assert default_recipe().spillover_path() is None
