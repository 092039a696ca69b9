"""docs/physics.md, the project's physics reference, exists and is what code and tests cite."""

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PHYSICS = ROOT / "docs" / "physics.md"
SOURCE_DIRS = ("corrections", "acquire", "drivers_generic", "tui", "tests")


def _python_files() -> list[Path]:
    return [path for folder in SOURCE_DIRS for path in (ROOT / folder).rglob("*.py")]


def test_code_and_tests_cite_the_reference_in_the_repository() -> None:
    dead = "REFERENCE" + ".md"  # the old notes file outside the repository
    citing = [path for path in _python_files() if dead in path.read_text(encoding="utf-8")]
    assert citing == []
    cited = [p for p in _python_files() if "docs/physics.md" in p.read_text(encoding="utf-8")]
    assert PHYSICS.is_file() and len(cited) > 10


def test_the_reference_holds_every_formula_and_its_source() -> None:
    text = PHYSICS.read_text(encoding="utf-8")
    for needle in (
        "k_TP = ((273.2 + T) / (273.2 + T0)) · (P0 / P)",
        "k_pol = (|M+| + |M−|) / (2 |M|)",
        "P_ion = (1 − n) / (M1/M2 − n)",
        "k_s = (n² − 1) / (n² − M1/M2)",
        "f(u) = ln(1 + u)/u",
        "D_w  = M_Q · N_D,w · k_Q",
        "ν_eff = u_c⁴ / Σ (u_i⁴ / ν_i)",
        "JCGM 101:2008",
        "TRS-398 (2000)",
        "from memory",
        "common practice",
        "133.322 387 415 Pa",
    ):
        assert needle in text, needle
