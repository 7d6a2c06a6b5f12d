"""The safety cautions every report and the README carry (one source for all of them)."""

CAUTIONS = (
    "Zones are screening results, not a structural assessment.",
    "Loose concrete over people and traffic is a fall hazard: confirm zones by sounding or other "
    "licensed practice before decisions, and follow local codes and the owner's inspection rules.",
    "Depth estimates are order-of-magnitude only.",
    "High sound pressure and the vibrometer's laser need the usual hearing and laser-safety precautions on site.",
)


def cautions_text(prefix: str = "") -> str:
    """The cautions as lines, each starting with ``prefix``."""
    return "\n".join(prefix + c for c in CAUTIONS)
