"""Why a run fell or failed its test: findings computed from its trace (plain numpy).

``findings`` ranks and words the findings; ``signals`` holds the detectors on
plain arrays they are built from.
"""

from .findings import diagnose, needs_diagnosis

__all__ = ["diagnose", "needs_diagnosis"]
