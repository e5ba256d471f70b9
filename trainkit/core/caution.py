"""The kit's cautions, written once: every report, page, model card and help text quotes these."""

__all__ = ["CAUTION", "SHORT_CAUTION", "CASCADE_WARNING_CAVEAT"]

#: The full caution (metrics.json, verification pages, the model card, reports).
CAUTION = (
    "This screener is a triage aid that decides which photos and regions a person looks at "
    "first; it is not an inspection. Its figures hold only for photos like its test set "
    "(same cameras, surfaces, lighting and scale). Defer to local codes and to licensed engineers "
    "for any judgement about a structure."
)

#: The one-sentence form (help texts, the end of the model card).
SHORT_CAUTION = (
    "The screener is a triage aid, not an inspection; its figures hold only for photos "
    "like its test set. Defer to local codes and licensed engineers."
)

#: Why a cascade is exported only when asked (export message, skip reason, model card).
CASCADE_WARNING_CAVEAT = (
    "a cascade's unfamiliar-surface warning comes from its first stage, which was measured "
    "nearly blind to a new surface (benchmarks/cascade.py: 0 of 20 frames of a reserved "
    "surface warned, against 20 of 20 with the main network alone)"
)
