"""Shared fixtures: LibreOffice (soffice) for checking what other programs see in priced workbooks."""
from __future__ import annotations

import csv
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

_APT_PACKAGE = "libreoffice-calc-nogui"
# CSV export options: comma, double quote, UTF-8, raw values (not as shown),
# no formulas, and -1 = every sheet to its own <stem>-<sheet>.csv (LibreOffice >= 7.2).
_CSV_FILTER = "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,false,false,false,-1"


def _find_soffice() -> str | None:
    return shutil.which("soffice") or shutil.which("libreoffice")


def _try_apt_install() -> str:
    """Install LibreOffice Calc with apt-get; return what went wrong, or ''."""
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    install = ["apt-get", "install", "-y", "-q", "--no-install-recommends", _APT_PACKAGE]
    try:
        for cmd in (install, ["apt-get", "update", "-q"], install):
            done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=900)
            if done.returncode == 0 and cmd is install and _find_soffice():
                return ""
        return (done.stderr or done.stdout).strip()[-300:]
    except (OSError, subprocess.TimeoutExpired) as exc:
        return str(exc)


@pytest.fixture(scope="session")
def soffice() -> str:
    """Path to soffice, or skip. As root with apt-get it installs LibreOffice Calc once when missing.

    Set LAYERWISE_NO_APT=1 to never install.
    """
    path = _find_soffice()
    if path:
        return path
    can_install = (
        hasattr(os, "geteuid") and os.geteuid() == 0 and shutil.which("apt-get") and not os.environ.get("LAYERWISE_NO_APT")
    )
    if not can_install:
        pytest.skip("soffice (LibreOffice) is not on PATH; install libreoffice-calc-nogui to run this test")
    problem = _try_apt_install()
    path = _find_soffice()
    if not path:
        pytest.skip(f"soffice is not on PATH and apt-get could not install {_APT_PACKAGE}: {problem}")
    return path


@pytest.fixture
def soffice_convert(soffice, tmp_path):
    """A function running ``soffice --convert-to FILTER`` on a file; returns the output folder."""

    def convert(path, convert_to):
        out = Path(tempfile.mkdtemp(prefix="lo-out-", dir=tmp_path))
        # A private profile per run: concurrent or stale profiles lock each other out.
        profile = Path(tempfile.mkdtemp(prefix="lo-profile-", dir=tmp_path))
        cmd = [
            soffice, f"-env:UserInstallation={profile.as_uri()}", "--headless", "--norestore",
            "--convert-to", convert_to, "--outdir", str(out), str(path),
        ]
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
        if not any(out.iterdir()):
            raise AssertionError(f"soffice wrote nothing (exit {done.returncode}): {done.stdout} {done.stderr}")
        return out

    return convert


@pytest.fixture
def soffice_csv(soffice_convert):
    """A function converting an xlsx with LibreOffice, without recalculating, to {sheet name: rows}."""

    def convert(xlsx, sheets):
        xlsx = Path(xlsx)
        out = soffice_convert(xlsx, _CSV_FILTER)
        result = {}
        for sheet in sheets:
            path = out / f"{xlsx.stem}-{sheet}.csv"
            if not path.exists():
                raise AssertionError(f"soffice wrote no {path.name}; it wrote {sorted(p.name for p in out.iterdir())}")
            with open(path, newline="", encoding="utf-8") as fh:
                result[sheet] = list(csv.reader(fh))
        return result

    return convert
