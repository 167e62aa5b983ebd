"""prescreen.io: the only code that reads user files (candidates and DFT results).

Import the submodules directly (``prescreen.io.structures``, ``prescreen.io.results``,
``prescreen.io.ids``, ``prescreen.io.formulas``, and ``prescreen.io.atomic`` for writing
files whole); this package module stays empty of
heavy imports so that ``import prescreen.io`` is instant.
"""

from __future__ import annotations

__all__: list[str] = []
