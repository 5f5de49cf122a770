"""The command line as scripts use it (DATA_CONTRACT.md): exit 0, 2 on bad input, 1 otherwise."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import func, select

from app.cli.main import main
from app.config import get_settings
from app.store import db
from app.store.models import Stay
from tests.ingest.csvtext import STAY_HEADER, UNITS, csv_bytes


@pytest.fixture(autouse=True)
def utc_site(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()


def write(tmp_path: Path, name: str, data: bytes) -> str:
    path = tmp_path / name
    path.write_bytes(data)
    return str(path)


def test_import_good_then_bad_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'fresh.db'}"  # not migrated: the CLI migrates on start
    assert main(["--db", url, "import", "units", write(tmp_path, "units.csv", UNITS.encode())]) == 0
    assert "2 new" in capsys.readouterr().out
    bad = csv_bytes(STAY_HEADER, "S-1,U-TEST,2026-03-01T10:00,,emergency,,67,f,a,b",
                    "S-2,U-TEST,2026-03-01T10:00,,emergency,,67,z,a,b")
    assert main(["--db", url, "import", "stays", write(tmp_path, "stays.csv", bad)]) == 2
    err = capsys.readouterr().err
    assert "stays.csv, line 3, column sex" in err and "nothing was imported" in err
    with db.session_scope(url) as session:
        assert session.scalar(select(func.count()).select_from(Stay)) == 0


def test_missing_file_is_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'x.db'}"
    assert main(["--db", url, "import", "stays", str(tmp_path / "nope.csv")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_db_upgrade_reports_head(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'm.db'}"
    assert main(["--db", url, "db", "upgrade"]) == 0
    assert f"revision {db.head_revision()}" in capsys.readouterr().out


def test_database_url_from_environment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "env.db"
    monkeypatch.setenv("MORROW_DATABASE_URL", f"sqlite:///{path}")
    assert main(["db", "upgrade"]) == 0
    assert path.exists()


def test_console_script_is_installed() -> None:
    script = Path(sys.executable).parent / "morrow"
    out = subprocess.run([str(script), "--help"], capture_output=True, text=True, check=True)
    assert "import" in out.stdout and "serve" in out.stdout


def test_demo_load_once(db_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--db", db_url, "demo", "load", "--no-shift"]) == 0
    assert "stays.csv" in capsys.readouterr().out
    assert main(["--db", db_url, "demo", "load"]) == 0
    assert "already loaded" in capsys.readouterr().out
