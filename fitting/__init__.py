"""Statistics and the user-facing edge of povmfit: scans, fits, reconstructions, reports, CLI."""
import povmfit as _povmfit  # noqa: F401  (switches JAX to float64)
