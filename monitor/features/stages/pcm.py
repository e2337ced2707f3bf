"""The pcm stage: the input quantised to int16 steps (``pcm_bits = 16``)."""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import CardProblem, key
from monitor.sound.samples import quantise_pcm16

# the q15 front end's mel sums: their fraction bits for power 2 (q46 power, q15 weights) and
# power 1 (q41 magnitude, q15 weights); `monitor.features.fixedpoint` computes with them
MEL_SUM_BITS = {2: 61, 1: 56}
NO_PER_WINDOW = ('frontend.arithmetic="q15" computes no per-window standardisation; set '
                 '[scaling] per_window = "none" or arithmetic = "float32"')


@record
class PcmConfig:
    """The pcm stage's key: ``pcm_bits``, 16 to quantise the input to int16, 0 to keep it.

    Attributes
    ----------
    pcm_bits : int
        16: quantise the input to int16 first, as the device's microphone path does; 0: keep
        float.
    arithmetic : {"float32", "q15", "micro-signal"}
        "q15": the front end in fixed point from int16 samples, as a board without a
        floating-point unit computes it (`monitor.features.fixedpoint`); "micro-signal": the
        spectrum, mel filter bank and log by the tflite-micro signal library's operators in the
        microcontroller interpreter (`monitor.features.signalgraph`); "float32": float.
    """
    pcm_bits: int = key(int, "16: quantise the input to int16 first, as the device's "
                        "microphone path does; 0: keep float", choices=(0, 16), default=0, off=0)
    arithmetic: str = key(str, "\"float32\"; \"q15\": the front end in fixed point from "
                          "int16 samples (kinds logmel and mfcc); \"micro-signal\": spectrum, "
                          "mel and log by tflite-micro's signal operators (logmel)",
                          choices=("float32", "q15", "micro-signal"),
                          default="float32", off="float32")

    def check(self, fe: Any, audio: Any) -> None:
        """CardProblem when ``arithmetic`` meets a kind or key it does not compute."""
        if self.arithmetic == "micro-signal":
            _check_signal(self, fe, audio)
            return
        if self.arithmetic != "q15":
            return
        if fe.kind not in ("logmel", "mfcc"):
            raise CardProblem(f'frontend.arithmetic="q15" computes the kinds "logmel" and '
                              f'"mfcc", not kind = "{fe.kind}"; set arithmetic = "float32"')
        if self.pcm_bits != 16:
            raise CardProblem('frontend.arithmetic="q15" takes int16 samples: set '
                              'pcm_bits = 16')
        if fe.preemphasis.preemphasis > 0:
            raise CardProblem('frontend.arithmetic="q15" computes no pre-emphasis; set '
                              'preemphasis = 0 or arithmetic = "float32"')
        n, p = fe.framing.fft_length, fe.spectrum.power
        units = 2.0 ** MEL_SUM_BITS[int(p)] / float(n) ** p
        big = max(fe.log.log_offset, fe.log.log_floor) * units / _smallest_gain(audio, fe)
        if big >= 2.0 ** 62:
            raise CardProblem(f"frontend.log_offset={fe.log.log_offset:g} (or log_floor) is too "
                              f"large for the q15 front end's 64-bit sums; use a smaller "
                              f"value or arithmetic = \"float32\"")


class PcmStage(Stage):
    """Quantisation of the input samples to int16 steps (``pcm_bits = 16``)."""
    name, config, part = "pcm", PcmConfig, "samples"

    @property
    def active(self) -> bool:
        """On when pcm_bits = 16."""
        return self.cfg.pcm_bits == 16

    @property
    def history(self) -> int:
        """Samples the C stream keeps: the window rounded up to whole hops."""
        a = self.audio
        return -(-a.window_samples // a.hop_samples) * a.hop_samples

    def run(self, x: np.ndarray) -> np.ndarray:
        """Samples rounded to int16 steps (x 32768, clipped to int16, / 32768), float32."""
        return quantise_pcm16(x)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same quantisation, returned as float64."""
        return quantise_pcm16(x).astype(np.float64)

    def c_lines(self) -> list[str]:
        """SM_PCM_BITS and SM_HIST_SAMPLES, the stream's history length."""
        return [c_define("SM_PCM_BITS", self.cfg.pcm_bits, "16: float input quantised to int16"),
                c_define("SM_HIST_SAMPLES", self.history,
                         "the stream's history: the window rounded up to whole hops")]

    def c_buffers(self) -> dict[str, int]:
        """The stream's history ``sm_hist`` (float32) and its int32 fill count ``sm_filled``."""
        return {"sm_hist": 4 * self.history, "sm_filled": 4}


def _check_signal(cfg: PcmConfig, fe: Any, audio: Any) -> None:
    """CardProblem when the signal operators' graph cannot compute the card's front end."""
    from monitor.features.dsp import mel_filterbank

    a = 'frontend.arithmetic="micro-signal"'
    if fe.kind != "logmel":
        raise CardProblem(f'{a} computes kind = "logmel" (the signal operators end at the log '
                          f'of the mel bands), not kind = "{fe.kind}"; set arithmetic = "float32"')
    if cfg.pcm_bits != 16:
        raise CardProblem(f"{a} takes int16 samples: set pcm_bits = 16")
    if fe.preemphasis.preemphasis > 0:
        raise CardProblem(f"{a} computes no pre-emphasis; set preemphasis = 0 or "
                          f'arithmetic = "float32"')
    if fe.spectrum.power != 2:
        raise CardProblem(f"{a} sums the power spectrum in the filter bank (the energy "
                          f"operator): set power = 2, not {fe.spectrum.power:g}")
    from monitor.features.signalgraph import bank_tables

    m = fe.mel
    try:
        w = mel_filterbank(sample_rate=audio.sample_rate, fft_length=fe.framing.fft_length,
                           mel_bands=m.mel_bands, fmin=m.fmin, fmax=m.fmax, scale=m.mel_scale,
                           norm=m.mel_norm, triangles=m.mel_triangles, dtype=np.float64)
    except ValueError:
        return  # the mel stage's own check names the key

    try:
        bank_tables(mel=w)
    except ValueError as e:
        raise CardProblem(f"{a}: the filter-bank operator cannot compute this mel matrix "
                          f"({e}); use fewer mel_bands or a longer fft_length") from None


def _smallest_gain(audio: Any, fe: Any) -> float:
    """The smallest peak weight of a mel band (the q15 front end divides the offset by it)."""
    from monitor.features.dsp import mel_filterbank

    m = fe.mel
    w = mel_filterbank(sample_rate=audio.sample_rate, fft_length=fe.framing.fft_length,
                       mel_bands=m.mel_bands, fmin=m.fmin, fmax=m.fmax, scale=m.mel_scale,
                       norm=m.mel_norm, triangles=m.mel_triangles).max(axis=1)
    return float(w[w > 0].min()) if np.any(w > 0) else 1.0
