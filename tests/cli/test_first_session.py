"""The README's "first session from the terminal", run as written, so the README cannot drift
from the command line: the code block is read from README.md and each line is run in order with
`apportion.cli.main` against a test server (tests/servers.py, the app in a thread over this
test's database), in a scratch directory.

What the test supplies, as a reader would: the server's address for `APPORTION_URL` (the README
says http://127.0.0.1:8000, where `make serve` listens), the secret `keys create` printed for
`<secret>`, and `APPORTION_DATABASE_URL` naming the server's database (the README says `keys
create` writes there). Every command must exit 0; then what they made is checked through the
API."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import httpx
import pytest
from servers import thread_server
from support import make_settings

from apportion.cli import main
from apportion.demo.files import AGE_BAND_REASON, FILES

README = Path(__file__).resolve().parents[2] / "README.md"
PROGRAM = ".venv/bin/apportion"


def session_lines() -> list[str]:
    text = README.read_text(encoding="utf-8")
    section = text.split("### A first session from the terminal", 1)[1]
    block = re.search(r"```\n(.*?)```", section, re.S)
    assert block, "the README's first session has no code block"
    lines = [ln.split("  #", 1)[0].strip() for ln in block.group(1).splitlines()]
    return [ln for ln in lines if ln]


def test_the_readme_block_is_what_this_test_expects() -> None:
    lines = session_lines()
    assert all(ln.startswith((PROGRAM + " ", "export ")) for ln in lines), lines
    assert lines[0].startswith(f"{PROGRAM} demo files ")
    named = " ".join(lines)
    for name in FILES:  # the session uses each file demo files writes
        assert name in named


def test_the_first_session_runs_as_written(
    db_url: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
    request: pytest.FixtureRequest,
) -> None:
    from apportion.app import create_app
    from apportion.config import get_settings

    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("APPORTION_DATABASE_URL", db_url)
    # `keys create` reads the settings once per process (lru_cache): read them from this
    # test's environment, and let later tests read their own
    get_settings.cache_clear()
    request.addfinalizer(get_settings.cache_clear)
    for var in ("APPORTION_URL", "APPORTION_KEY"):
        monkeypatch.delenv(var, raising=False)
    app = create_app(make_settings(db_url))
    secret = None
    with thread_server(app) as url:
        for line in session_lines():
            if line.startswith("export "):
                for pair in shlex.split(line)[1:]:
                    name, _, value = pair.partition("=")
                    if name == "APPORTION_URL":
                        value = url
                    if value == "<secret>":
                        assert secret, "the README exports the secret before creating a key"
                        value = secret
                    monkeypatch.setenv(name, value)
                continue
            argv = shlex.split(line)[1:]
            capsys.readouterr()
            code = main(argv)
            out, err = capsys.readouterr()
            assert code == 0, f"{line}\nexit {code}\n{out}\n{err}"
            if argv[:2] == ["keys", "create"]:
                secret = out.strip().splitlines()[-1]
            if argv[:2] == ["experiment", "show"]:
                assert f"not used for personalization: age_band ({AGE_BAND_REASON})" in out
            if argv[:2] == ["plan", "show"]:
                assert "plan version" in out and "lesson-length/1" in out

        h = {"Authorization": f"Bearer {secret}"}
        exp = httpx.get(f"{url}/v1/experiments/lesson-length", headers=h).json()
        assert [r["version"] for r in exp["readouts"]] == [1]
        version = httpx.get(f"{url}/v1/plans/lesson-length/versions/1", headers=h).json()
        assert version["status"] == "draft" and version["spec"]["comparison"]["number"] == 1
        assert (
            version["spec"]["success_metric"]
            == json.loads((tmp_path / "session" / "plan.json").read_text())["success_metric"]
        )
        model = httpx.get(f"{url}/v1/models/1", headers=h).json()
        assert "age_band" not in model["resolved_params"]["features"]


def test_demo_files_refuses_to_replace_files_unless_told(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from apportion.schemas.experiments import ExperimentIn

    out = tmp_path / "s"
    assert main(["demo", "files", str(out), "--learners", "300", "--seed", "2"]) == 0
    written = capsys.readouterr().out.split()
    assert written == [str(out / name) for name in FILES]
    decl = ExperimentIn.model_validate_json((out / "experiment.json").read_text())
    assert [f.key for f in decl.features if not f.personalize] == ["age_band"]
    assert len((out / "readout.csv").read_text().splitlines()) == 301  # header + learners
    before = (out / "readout.csv").read_bytes()
    assert main(["demo", "files", str(out), "--learners", "200"]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert (out / "readout.csv").read_bytes() == before
    assert main(["demo", "files", str(out), "--learners", "200", "--overwrite"]) == 0
    assert len((out / "readout.csv").read_text().splitlines()) == 201
