"""Every product module stays small (issue 16; DEVELOPERS.md 'Code standards': aim under about 400
lines, hard cap 450; the figures are this project's own rule, common practice, no source)."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("runtime", "export", "rigcast")
HARD_CAP = 450


def product_modules(root: Path = ROOT) -> list[Path]:
    """Every .py file under the three package folders, subpackages included."""
    return sorted(p for pkg in PACKAGES for p in (root / pkg).rglob("*.py"))


def oversized(files: list[Path], root: Path = ROOT) -> dict[str, int]:
    """'package/module.py' -> line count, for each file over the hard cap."""
    counts = {p.relative_to(root).as_posix(): len(p.read_text(encoding="utf-8").splitlines())
              for p in files}
    return {name: n for name, n in counts.items() if n > HARD_CAP}


def test_every_product_module_is_at_most_the_hard_cap() -> None:
    files = product_modules()
    assert len(files) >= 100, len(files)  # the walk really found the product
    assert {p.relative_to(ROOT).parts[0] for p in files} == set(PACKAGES)
    assert oversized(files) == {}, "split these modules"


def test_the_check_finds_a_module_over_the_cap(tmp_path: Path) -> None:
    for pkg in PACKAGES:
        (tmp_path / pkg / "sub").mkdir(parents=True)
        (tmp_path / pkg / "ok.py").write_text("x = 1\n" * HARD_CAP)
    (tmp_path / "export" / "sub" / "big.py").write_text("x = 1\n" * (HARD_CAP + 1))
    (tmp_path / "notes.py").write_text("x = 1\n" * 1000)  # outside the packages: not product
    assert oversized(product_modules(tmp_path), tmp_path) == {"export/sub/big.py": HARD_CAP + 1}
