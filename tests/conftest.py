"""Shared test settings.

Property tests (hypothesis) draw the same examples on every run by default
(the ``repeatable`` profile),
so a run of the suite - CI included - is reproducible: a red run is a real
regression, not a new random draw. To explore fresh examples, run
``pytest --hypothesis-profile=explore`` (and put any failure it finds into a
plain test).
"""
from hypothesis import settings

# chosen with --hypothesis-profile; pyproject.toml's addopts pick "repeatable"
settings.register_profile("repeatable", derandomize=True, database=None)
settings.register_profile("explore", derandomize=False)
