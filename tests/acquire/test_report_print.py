"""The printed report: headless Chromium prints it to PDF and pdftotext reads every page back.

Every printed page must carry the session id and "page n of m", and the first page the result
(dose per MU), on Letter (Chromium's default paper, which ``size: auto`` leaves to the printer)
and on A4. The session is the invented example worksheet (Example Clinic (fictional), DEMO-LA1
6 MV; not a real measurement) with many superseded attempts, so that it needs several pages.

Needs ``chromium`` and ``pdftotext`` (Debian's ``chromium`` and ``poppler-utils``; ``.ci/run``
installs them). Without them the print tests fail, saying so: they are never skipped.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import chargebook.acquire
import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_OK
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.reports.export import to_html
from chargebook.acquire.reports.printed import SignOff, review_block
from chargebook.acquire.session.worksheet import read_worksheet
from chargebook.corrections.evaluate import evaluate
from recorded_session import record_long_session
from test_export_html import Report

#: PDF page sizes in points (1/72 in): Letter 8.5 × 11 in, A4 210 × 297 mm (ISO 216).
LETTER_PT = (612, 792)
A4_PT = (595, 842)
EXAMPLES = Path(chargebook.acquire.__file__).parent / "examples"


def _tool(name: str, package: str) -> str:
    found = shutil.which(name)
    assert found, f"{name} is not installed: apt-get install -y {package} (see DEVELOPERS.md)"
    return found


def print_to_pdf(html: Path, pdf: Path) -> None:
    """Print ``html`` to ``pdf`` with headless Chromium (no network, a fresh profile)."""
    chromium = _tool("chromium", "chromium")
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run(
            [
                chromium,
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                "--no-first-run",
                f"--user-data-dir={profile}",
                f"--print-to-pdf={pdf}",
                html.as_uri(),
            ],
            check=True,
            capture_output=True,
            timeout=100,
        )
    assert pdf.exists(), f"chromium wrote no {pdf}"


def pdf_pages(pdf: Path) -> list[str]:
    """Return the text of each page of ``pdf`` (pdftotext -layout; pages end with a form feed)."""
    pdftotext = _tool("pdftotext", "poppler-utils")
    text = subprocess.run(
        [pdftotext, "-layout", str(pdf), "-"], check=True, capture_output=True, text=True
    ).stdout
    return [page for page in text.split("\f") if page.strip()]


def page_size_pt(pdf: Path) -> tuple[int, int]:
    """Return the first page's size in points, as pdfinfo states it."""
    info = subprocess.run(
        [_tool("pdfinfo", "poppler-utils"), str(pdf)], check=True, capture_output=True, text=True
    ).stdout
    found = re.search(r"Page size:\s+([\d.]+) x ([\d.]+) pts", info)
    assert found, info
    return round(float(found[1])), round(float(found[2]))


@pytest.fixture(scope="module")
def long_report(tmp_path_factory) -> tuple[str, int, float]:
    """Return (the HTML report, the session id, its dose per MU) of a long recorded session."""
    folder = tmp_path_factory.mktemp("print")
    path = folder / "station.sqlite"
    with Store.open(path) as store:
        session_id = record_long_session(store)
    with Store.open(path, read_only=True) as store:
        record = load_record(store, session_id)
        assert record.evaluation is not None and record.evaluation.dose_per_MU_cGy is not None
        return to_html(record), session_id, record.evaluation.dose_per_MU_cGy


def printed_pages(html: str, folder: Path, paper: str, running_head: str) -> list[str]:
    """Print ``html`` on ``paper`` (auto: the printer's, Letter here; or A4) and return its
    pages' text, having checked the paper size and that every page carries ``running_head``
    and "page n of m"."""
    if paper != "auto":  # the printer's choice, as a print dialog would make it
        html = html.replace("size: auto;", f"size: {paper};", 1)
    source = folder / "report.html"
    source.write_text(html, encoding="utf-8")
    pdf = folder / "report.pdf"
    print_to_pdf(source, pdf)
    assert page_size_pt(pdf) == (A4_PT if paper == "A4" else LETTER_PT)
    pages = pdf_pages(pdf)
    for number, text in enumerate(pages, start=1):
        assert running_head in text, f"page {number} has no {running_head!r}"
        assert f"page {number} of {len(pages)}" in text, f"page {number} is not numbered"
    return pages


@pytest.mark.e2e
@pytest.mark.parametrize("paper", ["auto", "A4"])
def test_every_printed_page_carries_the_session_and_page_n_of_m(
    long_report, tmp_path: Path, paper: str
) -> None:
    html, session_id, dose_per_MU = long_report
    pages = printed_pages(html, tmp_path, paper, f"chargebook session {session_id} ")
    assert len(pages) >= 3, "the long session should need several pages"
    first = pages[0]
    assert re.search(rf"dose per MU\s+{dose_per_MU:.4f} cGy/MU", first), first
    assert "PASS: within the tolerance" in first
    assert "Reviewed by" in pages[-1] and "signature" in pages[-1]


@pytest.mark.e2e
def test_a_printed_worksheet_carries_its_file_name_on_every_page(tmp_path: Path) -> None:
    worksheet = EXAMPLES / "demo-la1-6mv.toml"
    target = tmp_path / "worksheet.html"
    assert main(["correct", str(worksheet), "--html", "-o", str(target)]) == EXIT_OK
    dose_per_MU = evaluate(read_worksheet(worksheet).inputs).dose_per_MU_cGy
    html = target.read_text(encoding="utf-8")
    pages = printed_pages(html, tmp_path, "A4", "chargebook worksheet demo-la1-6mv.toml")
    assert len(pages) >= 2
    assert re.search(rf"dose per MU\s+{dose_per_MU:.4f} cGy/MU", pages[0]), pages[0]


def test_the_print_rules_fit_a4_and_letter_and_keep_rows_whole(long_report) -> None:
    html, session_id, _ = long_report
    style = html[html.index("<style>") : html.index("</style>")]
    assert "@page { size: auto; margin: 18mm 14mm 18mm 14mm;" in style
    assert f'@top-left {{ content: "chargebook session {session_id} ' in style
    assert '@bottom-right { content: "page " counter(page) " of " counter(pages);' in style
    assert re.search(r"tr, figure, \.review, \.result \{ break-inside: avoid;", style)
    assert "overflow-wrap: break-word" in style
    assert "<script" not in html and "src=" not in html and "href=" not in html


def test_the_review_block_has_empty_lines_until_a_review_fills_them() -> None:
    empty = Report()
    empty.feed(review_block("operator A", "2026-12-03 07:00:00 UTC", None))
    assert empty.rows[("Review and sign-off", "measured-by")][:2] == [
        "operator A",
        "2026-12-03 07:00:00 UTC",
    ]
    assert empty.rows[("Review and sign-off", "reviewed-by")] == ["", "", ""]
    assert empty.rows[("Review and sign-off", "decision")] == ["not yet reviewed"]
    review = SignOff("reviewer B", "approved", "k_s checked by hand", "2026-12-03 09:30:00 UTC")
    filled = Report()
    filled.feed(review_block("operator A", "2026-12-03 07:00:00 UTC", review))
    assert filled.rows[("Review and sign-off", "reviewed-by")] == [
        "reviewer B",
        "2026-12-03 09:30:00 UTC",
        "",
    ]
    assert filled.rows[("Review and sign-off", "decision")] == ["approved: k_s checked by hand"]
