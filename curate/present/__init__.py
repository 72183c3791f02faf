"""Presentation: terminal text (``text``, ``run_text``, ``tables``), HTML pieces (``html``) and
the catalog report (``report``). Only ``text``, ``run_text`` and ``tables`` import rich, and
nothing imports them but the CLI, so ``import curate`` stays free of terminal libraries.
"""

from __future__ import annotations
