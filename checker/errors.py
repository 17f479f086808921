"""One exception type per kind of bad input.

Every message names the file or series and says what was found and what was expected.
A batch records ``kind`` (the class's ``kind`` attribute) and the message for that series
and goes on with the others.
"""
from __future__ import annotations


class ReconauditError(Exception):
    """Base class of every error reconaudit raises on purpose."""

    kind = "error"

    def __init__(self, message: str, *, source: str | None = None):
        self.source = source
        super().__init__(f"{source}: {message}" if source else message)


class UnreadableFileError(ReconauditError):
    """The file cannot be read or parsed (truncated, not DICOM, permissions)."""

    kind = "unreadable_file"


class NotCTError(ReconauditError):
    """The object is not a CT image (another modality or a non-image object)."""

    kind = "not_ct"


class NotMonochromeError(ReconauditError):
    """The pixels are not single-channel grey values (MONOCHROME1/2)."""

    kind = "not_monochrome"


class NoPixelDataError(ReconauditError):
    """The object has no pixel data."""

    kind = "no_pixel_data"


class InconsistentGeometryError(ReconauditError):
    """Slices of one series disagree (size, orientation, spacing, duplicates)."""

    kind = "inconsistent_geometry"


class MissingSlicesError(ReconauditError):
    """A gap along the slice normal larger than the tolerated multiple of the spacing."""

    kind = "missing_slices"


class DecoderMissingError(ReconauditError):
    """The pixel data are compressed and no installed decoder handles the syntax."""

    kind = "decoder_missing"


class TooLargeError(ReconauditError):
    """The declared size exceeds the configured limit; nothing was allocated."""

    kind = "too_large"


class InvalidVolumeError(ReconauditError):
    """Pixel values or shape unusable (NaN/Inf everywhere, empty, 0-sized axis)."""

    kind = "invalid_volume"


class ProfileError(ReconauditError):
    """A profile (TOML) is malformed or names unknown settings."""

    kind = "profile"


class AnalysisError(ReconauditError):
    """An analysis failed on a volume it accepted; recorded, the batch goes on."""

    kind = "analysis_failed"
