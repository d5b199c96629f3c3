"""Streaming reader: any libsndfile format, in blocks with context, in constant memory.

The only module of ``features`` that opens files. Each block carries a core of at
most ``block_frames`` samples plus up to ``context_frames`` samples on each side, so
filters and windows that reach across block edges see the true neighbours. The cores
of all blocks tile the file exactly; every sample is decoded once.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

__all__ = ["AudioReadError", "AudioInfo", "AudioBlock", "AudioReader", "SegmentReader", "audio_info", "read_blocks"]


class AudioReadError(Exception):
    """A sound file cannot be read as it claims to be (unreadable, truncated, bad channel)."""

    def __init__(self, path: str | Path, reason: str) -> None:
        super().__init__(f"{path}: {reason}")
        self.path = str(path)
        self.reason = reason


@dataclass(frozen=True)
class AudioInfo:
    """What a sound file's header says.

    Attributes
    ----------
    sample_rate_hz : int, Hz
    frames : int, samples per channel
    channels : int
    format, subtype : str, libsndfile's names (e.g. 'WAV', 'PCM_16')
    """

    sample_rate_hz: int
    frames: int
    channels: int
    format: str
    subtype: str

    @property
    def duration_s(self) -> float:
        """Duration, s."""
        return self.frames / self.sample_rate_hz


@dataclass(frozen=True, eq=False)
class AudioBlock:
    """One block of one channel.

    Attributes
    ----------
    samples : np.ndarray [shape=(n,)], float32, sample values (full scale ±1.0)
        Core plus context.
    first_sample : int, index in the file of ``samples[0]``
    core_start, core_stop : int, indices in the file of the core [start, stop)
    sample_rate_hz : int, Hz
    """

    samples: np.ndarray
    first_sample: int
    core_start: int
    core_stop: int
    sample_rate_hz: int

    @property
    def core(self) -> np.ndarray:
        """The core samples, without context."""
        return self.samples[self.core_start - self.first_sample : self.core_stop - self.first_sample]


def audio_info(path: str | Path) -> AudioInfo:
    """Read a sound file's header; raise :class:`AudioReadError` if it cannot be opened."""
    try:
        info = sf.info(str(path))
    except (RuntimeError, sf.LibsndfileError, OSError) as exc:
        raise AudioReadError(path, f"cannot open as sound ({_reason(exc)})") from None
    if info.samplerate <= 0 or info.frames < 0:
        raise AudioReadError(path, "header gives no sample rate or length")
    if info.format == "WAV":
        declared = _wav_declared_frames(Path(path))
        # libsndfile quietly shortens a WAV whose data chunk ends early; a recorder
        # file cut short is a fault the analyst must hear about.
        if declared is not None and declared > info.frames:
            raise AudioReadError(path, f"truncated: header says {declared} samples, data ends at {info.frames}")
    return AudioInfo(int(info.samplerate), int(info.frames), int(info.channels), info.format, info.subtype)


def read_blocks(
    path: str | Path,
    block_frames: int,
    context_frames: int = 0,
    channel: int = 0,
    start_frame: int = 0,
    stop_frame: int | None = None,
) -> Iterator[AudioBlock]:
    """Yield the file in blocks of ``block_frames`` core samples with context.

    Parameters
    ----------
    path : str or Path
    block_frames : int, samples, > 0
    context_frames : int, samples, >= 0
        Extra samples on each side of the core, where the file has them.
    channel : int
        Channel to read (0-based).
    start_frame, stop_frame : int, samples
        Cores cover [start_frame, stop_frame) of the file; default the whole file.

    Raises
    ------
    AudioReadError
        When the file cannot be opened, lacks the channel, or ends before its header
        says (truncated); blocks already yielded are correct.
    """
    if block_frames <= 0 or context_frames < 0:
        raise ValueError("block_frames must be > 0 and context_frames >= 0")
    try:
        handle = sf.SoundFile(str(path))
    except (RuntimeError, sf.LibsndfileError, OSError) as exc:
        raise AudioReadError(path, f"cannot open as sound ({_reason(exc)})") from None
    with handle:
        if not 0 <= channel < handle.channels:
            raise AudioReadError(path, f"has {handle.channels} channel(s); channel {channel} does not exist")
        total = handle.frames
        stop = total if stop_frame is None else min(int(stop_frame), total)
        start = max(int(start_frame), 0)
        buf = np.empty(0, dtype=np.float32)
        buf_start = max(start - context_frames, 0)
        position = buf_start
        try:
            handle.seek(buf_start)
        except (RuntimeError, sf.LibsndfileError) as exc:
            raise AudioReadError(path, f"cannot seek to sample {buf_start} ({_reason(exc)})") from None
        for core_start in range(start, stop, block_frames):
            core_stop = min(core_start + block_frames, stop)
            want_start = max(core_start - context_frames, 0)
            want_stop = min(core_stop + context_frames, total)
            if want_stop > position:
                try:
                    new = handle.read(want_stop - position, dtype="float32", always_2d=True)
                except (RuntimeError, sf.LibsndfileError) as exc:
                    raise AudioReadError(path, f"read failed near sample {position} ({_reason(exc)})") from None
                got = new.shape[0]
                if got < want_stop - position:
                    raise AudioReadError(
                        path,
                        f"truncated: header says {total} samples, data ends at {position + got}",
                    )
                buf = np.concatenate([buf[want_start - buf_start :], new[:, channel]])
                position = want_stop
            else:
                buf = buf[want_start - buf_start :]
            buf_start = want_start
            block = np.ascontiguousarray(buf[: want_stop - buf_start])
            _zero_nonfinite(block)
            yield AudioBlock(
                block,
                buf_start,
                core_start,
                core_stop,
                int(handle.samplerate),
            )


def _zero_nonfinite(x: np.ndarray) -> np.ndarray:
    """Set NaN and infinite samples of ``x`` to 0 in place; return their indices.

    A float file can hold a NaN (a recorder fault, a broken conversion); left in, it
    would turn the noise floor and every window within a minute of it into NaN and
    silently lose the calls there. Zeros cost only the windows that hold them.
    """
    if np.isfinite(x).all():  # the common case: one pass, no allocation of indices
        return np.empty(0, dtype=np.int64)
    bad = np.flatnonzero(~np.isfinite(x))
    x[bad] = 0.0
    return bad


class AudioReader:
    """Random access to spans of one channel of a sound file, as float32 sample values.

    Use as a context manager. Spans are read sequentially where they follow each other,
    so reading a file front to back decodes each sample about once.

    Parameters
    ----------
    path : str or Path
    channel : int, 0-based
    """

    def __init__(self, path: str | Path, channel: int = 0) -> None:
        self.path = str(path)
        self.channel = channel
        try:
            self._handle = sf.SoundFile(self.path)
        except (RuntimeError, sf.LibsndfileError, OSError) as exc:
            raise AudioReadError(path, f"cannot open as sound ({_reason(exc)})") from None
        if not 0 <= channel < self._handle.channels:
            self._handle.close()
            raise AudioReadError(path, f"has {self._handle.channels} channel(s); channel {channel} does not exist")
        self.frames = int(self._handle.frames)
        self.sample_rate_hz = int(self._handle.samplerate)
        self._position = 0
        self.start, self.stop = 0, self.frames  # the samples this reader can give
        # Sample indices found NaN or infinite (and given as 0): a set, since context
        # reads see some samples twice.
        self.nonfinite: set[int] = set()

    def __enter__(self) -> AudioReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Release the file."""
        self._handle.close()

    def read(self, start: int, stop: int) -> np.ndarray:
        """Samples [start, stop) of the channel (clipped to the file), float32, full scale ±1."""
        start, stop = max(int(start), 0), min(int(stop), self.frames)
        if stop <= start:
            return np.empty(0, dtype=np.float32)
        try:
            if start != self._position:
                self._handle.seek(start)
            data = self._handle.read(stop - start, dtype="float32", always_2d=True)
        except (RuntimeError, sf.LibsndfileError) as exc:
            raise AudioReadError(self.path, f"read failed near sample {start} ({_reason(exc)})") from None
        got = data.shape[0]
        self._position = start + got
        if got < stop - start:
            raise AudioReadError(self.path, f"truncated: header says {self.frames} samples, data ends at {start + got}")
        x = np.ascontiguousarray(data[:, self.channel])
        bad = _zero_nonfinite(x)
        if bad.size:
            self.nonfinite.update((start + bad).tolist())
        return x


class SegmentReader:
    """Consecutive files of a continuous recording read as one stream of samples.

    Parameters
    ----------
    parts : list of (path, offset, frames)
        Each file and the index of its first sample in the stream; they must follow one
        another without gaps.
    channel : int, 0-based

    Attributes
    ----------
    start, stop : int, the stream indices [start, stop) the parts cover
    sample_rate_hz : int, Hz
    """

    def __init__(self, parts: list[tuple[str | Path, int, int]], channel: int = 0) -> None:
        self._parts: list[tuple[AudioReader, int]] = []
        try:
            for path, offset, _ in parts:
                self._parts.append((AudioReader(path, channel), int(offset)))
        except AudioReadError:
            self.close()
            raise
        rates = {r.sample_rate_hz for r, _ in self._parts}
        if len(rates) != 1:
            self.close()
            raise AudioReadError(parts[0][0], f"neighbouring files differ in sample rate ({sorted(rates)})")
        self.sample_rate_hz = rates.pop()
        self.start = min(o for _, o in self._parts)
        self.stop = max(o + r.frames for r, o in self._parts)

    def __enter__(self) -> SegmentReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Release the files."""
        for r, _ in self._parts:
            r.close()

    def nonfinite_in(self, offset: int) -> int:
        """Non-finite samples met so far in the part that starts at stream index ``offset``."""
        return sum(len(r.nonfinite) for r, o in self._parts if o == offset)

    def read(self, start: int, stop: int) -> np.ndarray:
        """Stream samples [start, stop), clipped to [self.start, self.stop), float32."""
        start, stop = max(int(start), self.start), min(int(stop), self.stop)
        pieces = []
        for r, o in self._parts:
            a, b = max(start, o), min(stop, o + r.frames)
            if b > a:
                pieces.append(r.read(a - o, b - o))
        return np.concatenate(pieces) if pieces else np.empty(0, dtype=np.float32)


def _wav_declared_frames(path: Path) -> int | None:
    """Frames the RIFF 'data' chunk declares, or None where it declares nothing usable."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
            if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
                return None
            block_align = None
            while True:
                chunk = fh.read(8)
                if len(chunk) < 8:
                    return None
                cid, size = chunk[:4], int.from_bytes(chunk[4:], "little")
                if cid == b"fmt ":
                    fmt = fh.read(size + (size & 1))
                    block_align = int.from_bytes(fmt[12:14], "little") if len(fmt) >= 14 else None
                elif cid == b"data":
                    if not block_align or size in (0, 0xFFFFFFFF):
                        return None
                    return size // block_align
                else:
                    fh.seek(size + (size & 1), 1)
    except OSError:
        return None


def _reason(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[-1] if text else type(exc).__name__
