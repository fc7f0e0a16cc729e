"""Reports and CSV: a PDF that renders with the caution and the trial's values, CSV round trips, refusals."""

import re
import shutil
import subprocess

import pytest

from ventcast.app import CAUTION
from ventcast.app.casefile import load_demo
from ventcast.app.cli import main
from ventcast.app.report import COURSE_COLUMNS, build_report, course_csv, minute_rows, observations_csv, read_csv

pypdf = pytest.importorskip("pypdf")


def _text(path):
    reader = pypdf.PdfReader(str(path))
    text = " ".join(page.extract_text() for page in reader.pages)
    text = text.replace("\ufb01", "fi").replace("\ufb02", "fl")
    return len(reader.pages), re.sub(r"\s+", " ", text)


@pytest.fixture(scope="module")
def report(tmp_path_factory, qapp):
    folder = tmp_path_factory.mktemp("report")
    case = load_demo("ards-moderate")
    res = build_report(case, {"A": ["peep_cmh2o=12"], "B": ["fio2=0.5"]}, folder / "trial.pdf", csv_dir=folder)
    return case, res, folder


def test_report_renders_with_the_caution_and_the_trial_values(report):
    _case, res, folder = report
    pages, text = _text(folder / "trial.pdf")
    assert pages == res["pages"] >= 2
    assert re.sub(r"\s+", " ", CAUTION) in text
    a = res["forecasts"]["A"]["steady"]
    assert f"{a['pao2_mmhg']:.0f}" in text and f"{a['paco2_mmhg']:.1f}" in text
    assert "PEEP 12 cmH2O" in text and "Trial B" in text
    for heading in ("Observations", "Lung fit", "Trials compared", "Outlook", "Limits", "Model assumptions and sources"):
        assert heading in text
    assert "Severinghaus 1979" in text and "ARDS Network 2000" in text
    assert "no real patient" in text  # the invented label, nothing identifying


def test_report_page_renders_to_png_where_a_renderer_exists(report, tmp_path):
    if shutil.which("pdftoppm") is None:
        pytest.skip("pdftoppm (poppler-utils) is not installed here")
    _case, _res, folder = report
    subprocess.run(["pdftoppm", "-r", "40", "-f", "1", "-l", "1", "-png", str(folder / "trial.pdf"),
                    str(tmp_path / "page")], check=True)
    png = next(tmp_path.glob("page*.png"))
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 5_000


def test_course_csv_round_trip(report):
    _case, res, folder = report
    header, rows = read_csv((folder / "course.csv").read_text())
    assert header == ["trial"] + [h for _k, h in COURSE_COLUMNS]
    assert all("[" in h for h in header[1:])  # units in every header
    for trial in ("A", "B"):
        expected = minute_rows(res["forecasts"][trial]["course"])
        got = [r[1:] for r in rows if r[0] == trial]
        assert len(got) == len(expected) == 61  # 0 to 60 min, every minute
        for g, e in zip(got, expected):
            assert g == pytest.approx([float(x) for x in e])
    assert read_csv(course_csv(res["forecasts"]))[1] == rows


def test_observations_csv_round_trip(report):
    case, _res, folder = report
    header, rows = read_csv((folder / "observations.csv").read_text())
    assert header[:6] == ["taken at [ISO 8601]", "FiO2 [fraction]", "PEEP [cmH2O]", "PaO2 [mmHg]", "PaCO2 [mmHg]",
                          "pH [pH units]"]
    assert [r[3] for r in rows] == [o["pao2_mmhg"] for o in case["observations"]]
    assert rows[0][1] == 0.5 and rows[1][1] == 0.6  # the settings in force at each observation
    assert read_csv(observations_csv(case))[1] == rows


@pytest.mark.parametrize("args,needle", [
    (["report", "--demo", "ards-moderate", "--out", "x.txt"], "--out"),
    (["report", "--demo", "ards-moderate", "--out", "/no/such/folder/x.pdf"], "does not exist"),
    (["report", "--demo", "ards-moderate", "--set", "fio2=70", "--out", "r.pdf"], "did you mean 0.70"),
])
def test_report_refuses_bad_input_and_writes_nothing(tmp_path, monkeypatch, capsys, args, needle):
    monkeypatch.chdir(tmp_path)
    assert main(args) == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []
