"""README, docs/ and DEVELOPERS.md kept honest: the configuration table, links, words, paths, cautions.

The README stays short (the job, cautions, quick start, screenshots, a tour; at most 300 lines) and
links every reference page in docs/. The configuration table in docs/configuration.md must be exactly
what ``halfwatch config-table`` generates from the Settings class; every image and relative link must
point at a file in the repository; the usual cautions of the trade (condition monitoring, not
protection; site rules first; lockout and qualified people) must appear (common practice); and no
committed document may carry an absolute machine path.
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / "README.md").read_text()
DEVELOPERS = (ROOT / "DEVELOPERS.md").read_text()
DOCS = {p.name: p.read_text() for p in sorted((ROOT / "docs").glob("*.md"))}
CONFIGURATION = DOCS["configuration.md"]


def test_configuration_table_matches_the_settings_class():
    from server.cli.docs import BEGIN, END, config_table

    assert CONFIGURATION.count(BEGIN) == 1 and CONFIGURATION.count(END) == 1
    inside = CONFIGURATION.split(BEGIN, 1)[1].split(END, 1)[0].strip("\n")
    stale = "docs/configuration.md is stale: run `halfwatch config-table --write docs/configuration.md`"
    assert inside == config_table().strip("\n"), stale


def test_every_setting_is_in_the_table_with_its_default():
    from server.settings import Settings

    rows = {m.group(1): m.group(2) for m in re.finditer(r"^\| `(HALFWATCH_[A-Z0-9_]+)` \| ([^|]*) \|",
                                                         CONFIGURATION, re.M)}
    for name in Settings.model_fields:
        assert f"HALFWATCH_{name.upper()}" in rows, name
    assert rows["HALFWATCH_PORT"].strip() == "`8000`"
    assert rows["HALFWATCH_SMTP_PASSWORD"].strip() == "(secret, empty)"


def test_config_table_command_prints_the_table():
    out = subprocess.run([sys.executable, "-m", "server", "config-table"], cwd=ROOT, capture_output=True,
                         text=True, check=True).stdout
    from server.cli.docs import config_table

    assert out == config_table()


def test_write_refuses_a_file_without_markers(tmp_path):
    target = tmp_path / "notes.md"
    target.write_text("# no table here\n")
    r = subprocess.run([sys.executable, "-m", "server", "config-table", "--write", str(target)], cwd=ROOT,
                       capture_output=True, text=True)
    assert r.returncode == 2 and "markers" in r.stderr
    assert target.read_text() == "# no table here\n"


def test_images_and_relative_links_exist():
    docs = [(ROOT, README), (ROOT, DEVELOPERS)] + [(ROOT / "docs", text) for text in DOCS.values()]
    for base, doc in docs:
        for target in re.findall(r"\]\(([^)#\s]+)(?:#[^)]*)?\)", doc):
            if target.startswith(("http://", "https://", "mailto:")):
                continue
            assert (base / target).exists(), target
    assert re.search(r"!\[[^\]]*\]\(docs/screenshots/[^)]+\.png\)", README)


def test_readme_is_short_and_links_every_reference_page():
    assert len(README.splitlines()) <= 300
    for name in DOCS:
        assert f"(docs/{name})" in README, f"docs/{name} is not linked from the README"


def test_sections_a_new_team_needs():
    for heading in ("## Quick start", "## Screenshots", "## A ten-minute tour", "## Cautions",
                    "## Reference"):
        assert re.search(rf"^{re.escape(heading)}", README, re.M), heading
    for words in ("make demo", "make test", "/docs"):
        assert words in README, words
    where = {"concepts.md": ("## Concepts for the trade", "## Sources", "ISO 20816", "Landau & Lifshitz"),
             "api.md": ("curl ", "import httpx", "## Sending data", "velocity_rms_mm_s"),
             "route-upload.md": ("manifest.csv",),
             "deployment.md": ("pg_dump", "proxy_pass", "HALFWATCH_SESSION_COOKIE_SECURE=true",
                               "docker compose up"),
             "configuration.md": ("HALFWATCH_DATABASE_URL",),
             "methods.md": ("Welch", "Mathieu", "Floquet", "Theil", "Fieller", "scipy.special")}
    for name, words in where.items():
        for w in words:
            assert w in DOCS[name], (name, w)
    for heading in ("## Architecture", "## From ingest to email", "## Running parts alone",
                    "## Adding an analysis feature", "## Adding an alarm rule", "## Tests and benchmarks"):
        assert re.search(rf"^{re.escape(heading)}", DEVELOPERS, re.M), heading


def test_cautions_of_the_trade_are_stated():
    text = " ".join(README.split()).lower()
    assert "not a machine protection or trip system" in text  # common practice
    assert "local codes take precedence" in text
    assert "lockout" in text and "qualified people" in text


def test_no_absolute_machine_paths_in_the_docs_and_demo():
    files = [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "docker-compose.yml", ROOT / "Dockerfile",
             ROOT / ".env.example", *sorted((ROOT / "docs").glob("*.md")),
             *sorted((ROOT / "halfwatch_demo").glob("*.py"))]
    absolute = re.compile(r"(?<![\w.])/(work|root|tmp|home)/")
    for path in files:
        text = path.read_text()
        assert not absolute.search(text), path
