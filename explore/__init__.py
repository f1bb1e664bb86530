"""explore: how brands are portrayed in the photos people post about them.

Stages, in data-flow order: study -> collect -> embed (cached) -> attributes,
contexts -> compare -> report. A stage never imports a later one.
"""

__version__ = "0.1.0"
