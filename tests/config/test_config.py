"""Config validation (likelihood.config): defaults, one-line errors naming file and key, the
config hash. The expected values are those written in the configs themselves and the
documented defaults (likelihood/config/schema.py); the hash rule is checked by its definition
(settings and input-file *contents*, not paths or sampler settings)."""
import os
import shutil

import pytest
import yaml

from likelihood.config import Config, load_config, validate
from likelihood.errors import ConfigError

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def test_demo_config_values_and_defaults():
    cfg = load_config(os.path.join(ROOT, "configs", "demo.yaml"))
    assert isinstance(cfg, Config) and cfg["run"] == "lanternfish-demo"
    assert cfg["survey"]["geometry"] == {"shape": "shell", "r_min": 1937.0, "r_max": 3144.0}
    assert cfg["data"]["ells"] == [0, 2] and cfg["data"]["k_max"] == 0.05
    assert cfg["effects"]["integral_constraint"] == "global" and cfg["effects"]["observer"]
    assert list(cfg["parameters"]) == ["b1", "fnl", "nu_obs", "shot_noise"]
    assert cfg["parameters"]["nu_obs"]["prior"]["kind"] == "gauss"
    assert cfg.output_folder == os.path.join("chains", "lanternfish-demo")
    assert cfg.resolve("demo_data.txt") == os.path.join(ROOT, "configs", "demo_data.txt")


MINIMAL = {"survey": {"redshift": 1.0, "nbar": 1e-4, "geometry": {"shape": "box", "volume": 1e9}},
           "data": {"mock": {"k_min": 0.01, "k_max": 0.05, "n_bins": 4}, "ells": [0]},
           "parameters": {"b1": {"flat": [0.5, 5.0]}}}


def test_minimal_config_gets_the_documented_defaults():
    cfg = validate(MINIMAL, src="m.yaml")
    assert cfg["run"] == "m"
    assert cfg["cosmology"]["preset"] == "planck2018" and cfg["cosmology"]["transfer"] == "eh98"
    assert cfg["effects"]["window"] is False            # a periodic box has no window
    assert cfg["covariance"]["kind"] == "gaussian"
    assert cfg["tracer"]["p"] == 1.0                     # design: p = 1 by default


@pytest.mark.parametrize("patch, needle", [
    ({"survey": {"redshift": 1.0, "nbar": 1e-4, "geometry": {"shape": "sphear", "radius": 1.0}}},
     "did you mean 'sphere'"),
    ({"survey": {"redshift": -1.0, "nbar": 1e-4, "geometry": {"shape": "box", "volume": 1e9}}},
     "survey.redshift"),
    ({"data": {"ells": [0], "mock": {"k_min": 0.05, "k_max": 0.01}}}, "k_min < k_max"),
    ({"data": {"ells": [1], "mock": {"k_min": 0.01, "k_max": 0.05}}}, "odd multipoles"),
    ({"effects": {"rsd": "yes"}}, "expected true or false"),
    ({"parameters": {}}, "nothing to sample"),
    ({"sampling": {"walkers": 2.5}}, "whole number"),
])
def test_errors_name_file_and_key(patch, needle):
    raw = dict(MINIMAL, **patch)
    with pytest.raises(ConfigError, match=needle) as exc:
        validate(raw, src="m.yaml")
    assert str(exc.value).startswith("m.yaml") and "\n" not in str(exc.value)


def test_hash_follows_contents_not_paths_or_sampler(tmp_path):
    src = os.path.join(ROOT, "configs")
    for name in ("demo.yaml", "demo_data.txt", "demo_cov.txt"):
        shutil.copy(os.path.join(src, name), tmp_path / name)
    h0 = load_config(tmp_path / "demo.yaml").hash
    assert h0 == load_config(os.path.join(src, "demo.yaml")).hash     # moved files: same hash
    raw = yaml.safe_load((tmp_path / "demo.yaml").read_text())
    raw["sampling"]["max_steps"] = 99999
    raw["run"] = "other-name"
    (tmp_path / "more.yaml").write_text(yaml.safe_dump(raw))
    assert load_config(tmp_path / "more.yaml").hash == h0             # sampler and name: same
    with open(tmp_path / "demo_data.txt", "a") as fh:
        fh.write("# edited\n")
    assert load_config(tmp_path / "demo.yaml").hash != h0             # edited data: new hash


def test_cosmology_names_follow_the_literature_notation():
    """omega_c (ω_c = Ω_c h²) and ln_1e10_As (ln(10¹⁰ A_s)) set the cosmology (issue 15, item
    20); the A_s they give is the definition exp(x)·1e-10 (Planck 2018 VI, Table 2 notation)."""
    import math
    from likelihood.model import factories
    raw = yaml.safe_load(open(os.path.join(ROOT, "configs", "demo.yaml")))
    raw["cosmology"]["overrides"] = {"omega_c": 0.13, "ln_1e10_As": 3.1}
    cfg = validate(raw, src="t.yaml", base_dir=os.path.join(ROOT, "configs"))
    cosmo = factories.cosmology(cfg)
    assert cosmo.omega_c == 0.13
    assert math.isclose(cosmo._params["A_s"], math.exp(3.1) * 1e-10, rel_tol=1e-12)
    raw["cosmology"]["overrides"] = {"omega_cdm": 0.13}
    with pytest.raises(ConfigError, match="t.yaml: cosmology.overrides: unknown key 'omega_cdm' "
                                          r"\(renamed: write 'omega_c'"):
        validate(raw, src="t.yaml", base_dir=os.path.join(ROOT, "configs"))
