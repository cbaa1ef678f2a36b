"""Suite-wide settings: property tests are seeded (derandomized) so that `make test` and CI run
the same examples every time; `make fuzz` / `make slow` explore at random (their own settings)."""

from hypothesis import settings

settings.register_profile("seeded", derandomize=True, deadline=None)
settings.load_profile("seeded")
