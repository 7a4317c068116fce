"""The rules a run screens under: the shipped rule file plus the site's config."""

from cardiosieve.pipeline.config import load_settings
from cardiosieve.pipeline.run import site_rules


def _settings(tmp_path, text: str):
    path = tmp_path / "site.toml"
    path.write_text(text, encoding="utf-8")
    return load_settings(str(path))


def test_the_old_prior_limit_follows_the_sites_episode_window(tmp_path):
    # An elevation inside one episode is persistent, not old (docs/prioritisation.md): with a
    # 48 h episode window the ST screen's "old prior ECG" limit is 48 h too, and the rule
    # version says the rules were changed locally.
    rules = site_rules(_settings(tmp_path, "[windows]\nepisode_h = 48\n"))
    assert rules["st_deviation"]["prior_old_h"].value == 48.0
    assert "+site." in rules["st_deviation"].version


def test_the_default_window_leaves_the_shipped_rules_alone(tmp_path):
    rules = site_rules(_settings(tmp_path, "[windows]\nepisode_h = 72\n"))
    assert rules["st_deviation"]["prior_old_h"].value == 72.0
    assert "+" not in rules["st_deviation"].version


def test_a_site_value_for_the_old_prior_limit_wins(tmp_path):
    rules = site_rules(_settings(tmp_path, "[windows]\nepisode_h = 48\n[rules.st_deviation]\nprior_old_h = 96\n"))
    assert rules["st_deviation"]["prior_old_h"].value == 96.0
