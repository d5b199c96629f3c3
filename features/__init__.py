"""Pure array functions in physical units, and the streaming reader.

Modules: ``calibration`` (recording chain), ``spectrogram`` (PSD on a physical grid),
``levels`` (ISO 18405 metrics, fractional-octave bands), ``propagation`` (spreading,
absorption), ``streaming`` (block reader).
"""

from ._validation import ParameterError
from .calibration import RecordingChain, ResponseCurve, pressure_from_samples, samples_from_pressure
from .spectrogram import Spectrogram, SpectrogramGrid, psd_spectrogram
from .streaming import AudioBlock, AudioInfo, AudioReadError, audio_info, read_blocks

__version__ = "0.1.0"

__all__ = [
    "ParameterError",
    "RecordingChain",
    "ResponseCurve",
    "pressure_from_samples",
    "samples_from_pressure",
    "Spectrogram",
    "SpectrogramGrid",
    "psd_spectrogram",
    "AudioBlock",
    "AudioInfo",
    "AudioReadError",
    "audio_info",
    "read_blocks",
]
