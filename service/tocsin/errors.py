"""The few exception classes Tocsin raises. Messages name the bad value."""


class TocsinError(Exception):
    """Base class of every error Tocsin raises on purpose."""


class ConfigError(TocsinError):
    """A configuration or registry file is invalid; the message names the key."""


class BatchRejected(TocsinError):
    """A hit batch broke a rule of the v1 contract and is rejected whole.

    ``reason`` is a short machine-readable key (used as a metrics label and in
    replay summaries); ``field`` names the offending field of the batch.
    """

    def __init__(self, reason: str, field: str, detail: str) -> None:
        super().__init__(f"{reason}: field {field!r}: {detail}")
        self.reason = reason
        self.field = field
        self.detail = detail
