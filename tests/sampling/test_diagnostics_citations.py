"""The diagnostics cite papers, not software systems (issue 16, item 8)."""

from __future__ import annotations

import re
from pathlib import Path

import holonomic.sampling.diagnostics as diagnostics


def test_diagnostics_cite_the_papers_not_a_software_system():
    source = Path(diagnostics.__file__).read_text(encoding="utf-8")
    assert not re.search(r"\bStan\b", source)
    assert "Bayesian Analysis 16 (2021) 667-718" in source  # Vehtari et al., rank-normalised R-hat/ESS
    assert "Statistical Science 7 (1992)" in source          # Geyer, initial sequences
    assert "recalled from memory" in source                  # the ESS cap is from memory
