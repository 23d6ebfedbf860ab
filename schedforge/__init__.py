"""schedforge: design and verify quantum-annealing schedules with flat ends.

The public API is re-exported here; see DEVELOPERS.md for the module map.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
