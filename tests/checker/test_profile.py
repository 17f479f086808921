from __future__ import annotations

import pytest

from reconaudit.checker.errors import ProfileError
from reconaudit.checker.profile import load_profile


def test_default_profile_enables_every_importable_analysis_and_has_sources():
    prof = load_profile()
    assert prof.name == "default"
    assert prof.protocol_key == ["series_description", "convolution_kernel", "slice_thickness_mm"]
    for metric, entry in prof.baseline.items():
        assert entry["source"], metric
        assert 0 < entry["tolerance"] < 1
    text = prof.to_toml()
    assert "[baseline.noise_hu]" in text


def test_site_profile_overrides_key_by_key(tmp_path):
    site = tmp_path / "site.toml"
    site.write_text('[profile]\nname = "night"\n[analyses.ttf]\nenabled = false\n[baseline.noise_hu]\ntolerance = 0.05\nsource = "site choice"\n')
    prof = load_profile(site)
    assert prof.name == "night"
    assert "ttf" not in prof.enabled_analyses()
    assert prof.baseline_tolerance("noise_hu") == 0.05
    assert prof.baseline_tolerance("f50_per_mm") == 0.10  # from the default
    assert prof.digest() != load_profile().digest()


@pytest.mark.parametrize(
    "text, words",
    [
        ("[analyses.sharpness]\nenabled = true\n", "unknown analysis"),
        ("[colours]\nx = 1\n", "unknown section"),
        ("[baseline.noise_hu]\nsource = 'x'\n", "numeric 'tolerance'"),
        ("[baseline.speed]\ntolerance = 1\n", "unknown baseline metric"),
        ("this is = = not toml", "not valid TOML"),
    ],
)
def test_bad_profiles_are_refused_with_the_file_named(tmp_path, text, words):
    site = tmp_path / "bad.toml"
    site.write_text(text)
    with pytest.raises(ProfileError) as err:
        load_profile(site)
    assert words in str(err.value)
    assert str(site) in str(err.value)


def test_missing_profile_file_is_named(tmp_path):
    with pytest.raises(ProfileError, match="not found"):
        load_profile(tmp_path / "nope.toml")
