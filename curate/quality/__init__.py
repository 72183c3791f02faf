"""Quality: noise estimates, trust grades, consistency between datasets, and their actions.

``noise``, ``grading`` and ``consistency`` are pure computation (arrays in, typed results out);
``measured`` gives a version's measured SD; ``actions`` reads the ledger, calls them, and
writes what a person decided as new versions and what the tool suggests as events.
"""

from __future__ import annotations
