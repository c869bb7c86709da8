"""Domain errors. Each knows its HTTP status and CLI exit code, so the edges translate them in one place."""


class KnowngoodError(Exception):
    """Base of every error a user can cause; the message names the offending value or file."""

    http_status = 400
    exit_code = 2
    title = "Bad request"


class BadImage(KnowngoodError):
    """An image could not be decoded or does not meet the limits."""

    http_status = 422
    title = "Bad image"


class ImageTooLarge(BadImage):
    """Too many pixels (decompression-bomb guard) or too many bytes."""

    http_status = 413
    title = "Image too large"


class BadDataset(KnowngoodError):
    """A folder of images is empty, inconsistent or too small for what was asked."""

    title = "Bad dataset"


class BadBundle(KnowngoodError):
    """A model bundle is corrupt, truncated, of a newer format or inconsistent."""

    http_status = 422
    title = "Bad model bundle"


class BadConfig(KnowngoodError):
    """An unknown or out-of-range setting."""

    title = "Bad configuration"


class ModelNotReady(KnowngoodError):
    """No model is loaded yet."""

    http_status = 503
    exit_code = 1
    title = "Model not ready"
