"""The cheap descriptors a first-stage screen reads, for every window of a block.

A cascade scores every window with a few band-energy descriptors that cost little more
than the spectrogram and noise floor already at hand, and computes the full descriptors
(:func:`callsieve.features.descriptors.describe_windows`) only for the windows it keeps.
The values here are the same descriptors, computed the same way, as the columns of the
same names there (tested in ``tests/test_cascade.py``), so a screen trained on
descriptor rows reads them unchanged.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .descriptors import DescriptorSettings, subband_bin_masks

__all__ = ["screen_names", "screen_values", "frames_of_windows"]

_TINY = 1e-30


def screen_names(settings: DescriptorSettings) -> list[str]:
    """Names of the screen's descriptors, in column order (all are descriptor names)."""
    k = range(1, settings.n_subbands + 1)
    return ["snr_db", *(f"subband{i}_excess_db" for i in k), *(f"subband{i}_peak_excess_db" for i in k)]


def screen_values(
    psd_db: np.ndarray,
    noise_db: np.ndarray,
    frequency_hz: np.ndarray,
    window_first_frame: np.ndarray,
    settings: DescriptorSettings,
) -> np.ndarray:
    """The screen's descriptors of every window, columns as :func:`screen_names`.

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz
    noise_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz, floor at each frame
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz, evenly spaced
    window_first_frame : np.ndarray [shape=(n_windows,)], column of each window's first frame
    settings : DescriptorSettings

    Returns
    -------
    np.ndarray [shape=(n_windows, 1 + 2 n_subbands)], float32, dB: in-band SNR, then each
    sub-band's window-mean excess, then each sub-band's strongest-frame excess
    """
    n_w = settings.frames_per_window
    first = np.asarray(window_first_frame, dtype=np.int64)
    masks = subband_bin_masks(frequency_hz, settings)
    df = float(frequency_hz[1] - frequency_hz[0])
    # Linear power summed per sub-band with one matrix product each (the sub-bands tile
    # the band, so the band's power is their sum); float32 as in describe_windows.
    p_lin = 10.0 ** (psd_db.astype(np.float32, copy=False) / np.float32(10.0))
    n_lin = 10.0 ** (noise_db.astype(np.float32, copy=False) / np.float32(10.0))
    sub_p = masks.astype(np.float32) @ p_lin  # (n_sub, n_frames), µPa²/Hz summed over bins
    sub_n = masks.astype(np.float32) @ n_lin
    band_p = p_lin.sum(axis=0) * df
    band_n = n_lin.sum(axis=0) * df
    win_p = sliding_window_view(band_p, n_w)[first].mean(axis=1)
    win_n = sliding_window_view(band_n, n_w)[first].mean(axis=1)
    snr = 10.0 * np.log10(np.maximum(win_p - win_n, 1e-3 * win_n) / np.maximum(win_n, _TINY))
    view_p = sliding_window_view(sub_p, n_w, axis=1)[:, first]  # (n_sub, n_win, n_w)
    view_n = sliding_window_view(sub_n, n_w, axis=1)[:, first]
    mean_p, mean_n = view_p.mean(axis=2) * df, view_n.mean(axis=2) * df
    excess = 10.0 * np.log10(np.maximum(mean_p, _TINY) / np.maximum(mean_n, _TINY))
    ratio = sub_p / np.maximum(sub_n, _TINY)
    peak = sliding_window_view(ratio, n_w, axis=1)[:, first].max(axis=2)
    peak_db = 10.0 * np.log10(np.maximum(peak, _TINY))
    return np.column_stack([snr, excess.T, peak_db.T]).astype(np.float32)


def frames_of_windows(window_first_frame: np.ndarray, frames_per_window: int, n_frames: int) -> np.ndarray:
    """Columns (sorted, unique) of the frames that the given windows cover.

    Parameters
    ----------
    window_first_frame : np.ndarray [shape=(n_windows,)], first column of each window
    frames_per_window : int
    n_frames : int, columns in all

    Returns
    -------
    np.ndarray [shape=(n_used,)], int64
    """
    cover = np.zeros(n_frames + 1, dtype=np.int64)
    first = np.asarray(window_first_frame, dtype=np.int64)
    # +1 at each window's first frame, -1 after its last: covered where the running sum > 0.
    np.add.at(cover, first, 1)
    np.add.at(cover, first + frames_per_window, -1)
    return np.flatnonzero(np.cumsum(cover[:-1]) > 0)
