"""The pipeline's exception and warning classes.

Errors say what was expected and how to fix it; file errors name the file,
the HDU or keyword, the expected value and a fix.
"""

__all__ = [
    "PipelineError", "ConfigError", "InputFileError", "CalibrationError",
    "WavelengthSolutionError", "ExtractionError", "FluxCalibrationError",
    "PipelineWarning", "InputFileWarning", "CalibrationQualityWarning",
    "ArcQualityWarning", "FlexureWarning", "OrderOverlapWarning", "FluxCalibrationWarning",
]


class PipelineError(Exception):
    """Base class of every error the pipeline raises on purpose."""


class ConfigError(PipelineError, ValueError):
    """A config value is missing, of the wrong type or out of range."""


class InputFileError(PipelineError):
    """A raw or intermediate file cannot be used.

    Parameters
    ----------
    path : str
        The offending file.
    problem : str
        What is wrong, naming the HDU or keyword and what was expected.
    """

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


class CalibrationError(PipelineError):
    """A master calibration cannot be built from the frames given."""


class WavelengthSolutionError(PipelineError):
    """No trustworthy wavelength solution could be found."""


class ExtractionError(PipelineError):
    """Tracing or extraction failed for a frame."""


class FluxCalibrationError(PipelineError):
    """No sensitivity can be fitted from the standard-star spectra given."""


class PipelineWarning(UserWarning):
    """Base class of the pipeline's warnings (recoverable quality problems)."""


class InputFileWarning(PipelineWarning):
    """A file was rejected or a value had to be replaced; the night goes on."""


class CalibrationQualityWarning(PipelineWarning):
    """A measured detector property disagrees with its configured value."""


class ArcQualityWarning(PipelineWarning):
    """Arc lines were rejected or the solution is weaker than expected."""


class FlexureWarning(PipelineWarning):
    """The measured flexure shift exceeds the configured limit."""


class OrderOverlapWarning(PipelineWarning):
    """Light of another grating order falls on the detector inside the coverage."""


class FluxCalibrationWarning(PipelineWarning):
    """A spectrum stays uncalibrated, or extinction/sensitivity had to be extrapolated."""
