"""Site configuration is checked strictly at start-up: a slip is exit 2 naming the setting, before
anything is read or written, never a silently narrower run."""

from pathlib import Path

import pytest

from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.config import ConfigError, load_settings
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake


@pytest.mark.parametrize("text, named", [
    # A list given as a plain string would be read letter by letter: every potassium lost.
    ('[analytes]\npotassium = "2823-3"\n', "[analytes] potassium"),
    ('[drugs]\nqt_prolonging = "sotalol"\n', "[drugs] qt_prolonging"),
    ('[drugs]\nqt_prolonging = ["sotalol", 3]\n', "[drugs] qt_prolonging"),
    # Unknown keys are refused, not ignored.
    ('[site]\ntimzone = "Europe/London"\n', "timzone"),
    ('[units]\necgs = {}\n', "ecgs"),
    ('[units.ecg_lead]\namplitudes = "uV"\n', "amplitudes"),
    ('[[troponin]]\ncode = "89579-7"\nurl_ng_l = 26\nurl = 30\n', "url"),
    # Wrong types, NaN, infinities, negative windows and limits.
    ('[windows]\nlab_before_h = true\n', "[windows] lab_before_h"),
    ('[windows]\nlab_before_h = nan\n', "[windows] lab_before_h"),
    ('[windows]\nepisode_h = inf\n', "[windows] episode_h"),
    ('[windows]\nlab_after_h = -6\n', "[windows] lab_after_h"),
    ('[windows]\nlab_after_h = "6"\n', "[windows] lab_after_h"),
    ('[[troponin]]\ncode = "89579-7"\nurl_ng_l = 0\n', "url_ng_l"),
    ('[[troponin]]\ncode = "89579-7"\nurl_ng_l = -26\n', "url_ng_l"),
    ('[[troponin]]\ncode = "89579-7"\nurl_ng_l = nan\n', "url_ng_l"),
    ('[site]\ntimezone = 1\n', "timezone"),
    ('[lab_codes]\nK = 2823\n', "[lab_codes]"),
    # [rules.*] overrides are checked at start-up, not after alignment.
    ('[rules.long_qt]\nqtc_high_risk = nan\n', "qtc_high_risk"),
    ('[rules.long_qt]\nqtc_high_rsik = 480\n', "qtc_high_rsik"),
    ('[rules.long_qt]\nqtc_high_risk = true\n', "qtc_high_risk"),
    ('[rules.qt]\nqtc_high_risk = 480\n', "qt"),
])
def test_a_config_slip_is_exit_2_naming_the_setting_before_anything_is_read_or_written(tmp_path, capsys, text, named):
    config = tmp_path / "site.toml"
    config.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=None):
        load_settings(config)
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row()], labs=[lab_row()], patients=[patient_row()])
    out = tmp_path / "out"
    code = main(["run", "--lake", str(lake), "--out", str(out), "--config", str(config),
                 "--start", "2026-11-29", "--end", "2026-11-30"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and named in err and len(err.splitlines()) == 1
    assert not out.exists()


def test_the_sample_site_config_is_accepted_as_written():
    settings = load_settings(Path(__file__).resolve().parents[1] / "sample_lake" / "site.toml")
    assert settings.analytes["potassium"] == ("2823-3",)
    assert "sotalol" in settings.drugs["qt_prolonging"]
