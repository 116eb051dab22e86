"""How many examples a hypothesis test runs, scaled by the hypothesis profile of the run.

A test that needs more (or fewer) examples than the profile's default writes
``@settings(max_examples=scaled(100))``: 100 under the "ci" profile (``make test``), an eighth
under "fast" (``make test-fast``), ten times under "dev" (``HYPOTHESIS_PROFILE=dev``). A test
whose every example is a whole ingest (or several) may ask for ``at_least=1`` so that the fast
lane runs one small example of it.
"""

from __future__ import annotations

from hypothesis import settings

#: max_examples of the "ci" profile (tests/conftest.py), the scale's unit.
CI_EXAMPLES = 40


def scaled(n: int, at_least: int = 3) -> int:
    """``n`` examples under the "ci" profile, in proportion under the others (``at_least`` at minimum)."""
    return max(at_least, n * settings().max_examples // CI_EXAMPLES)
