"""tolerance: Monte Carlo and worst-case tolerance analysis of transistor switching stages.

The engine (this package) knows nothing about transistors; the physics lives in
``tolerance.models`` (the top-level ``models/`` folder of the source tree, mapped into this
package's namespace on install).
"""

from __future__ import annotations

from pathlib import Path as _Path

__version__ = "0.1.0"

# In a source checkout the physics sits beside this package in ``models/`` rather than inside it;
# adding the checkout root to the package path lets ``tolerance.models`` resolve there, so tests and
# ``python -m tolerance`` run against the checkout. An installed wheel has ``tolerance/models``
# itself and this branch does nothing.
_checkout_root = _Path(__file__).resolve().parent.parent
if not (_Path(__file__).resolve().parent / "models").is_dir() and (
    _checkout_root / "models" / "__init__.py"
).is_file():
    __path__.append(str(_checkout_root))  # noqa: F821 - __path__ is defined for packages


def load_study(path=None):
    """Load and validate a study file; without a path, the built-in demo study (see
    :func:`tolerance.api.load_study`)."""
    from tolerance.api import load_study as _load

    return _load(path)


__all__ = ["__version__", "load_study"]
