"""The report of one conversion, as typed data.

:func:`requant.convert.convert_file` returns a :class:`Report`;
:func:`requant.report.build.build_report` is the one place that makes one, and
:mod:`requant.report.write` and :mod:`requant.report.render` turn it into
JSON, HTML and Markdown. :meth:`Report.to_dict` is the JSON form: the keys,
nesting and values of ``--report out.json`` (docs/theory.md, "The report"),
with None written as ``null``.

Figures the streaming analysis supplies (weighted noise, signal-correlated
error, true peak, DC offset) are None here when the analysis did not run, and
their keys are then absent from the JSON form, as they always were; a figure
that was measured but has no finite value (the weighted noise of a file too
short for one spectrum, the true peak of digital silence) is None here and
``null`` in JSON.

Units follow the names: ``_db`` decibels, ``_dbfs`` decibels re full scale
(AES17: a full-scale sine reads 0 dBFS), ``_dbtp`` decibels true peak,
``_lsb`` and ``_lsb2`` LSB and LSB² of the output word length, ``_s``
seconds, ``_hz`` hertz, ``frames`` sample frames, ``_fraction`` a share
between 0 and 1. Offsets without a unit are fractions of full scale.

This module needs only the standard library, so the command line may import
it without loading numpy. The classes are frozen; they compare by identity
and keep the default repr (``eq=False, repr=False``): nothing compares
reports, and generating those methods for every class cost a few
milliseconds of every conversion's start-up.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["Report", "ReportSettings", "InputFacts", "OutputFacts", "MetadataRecord",
           "ErrorSignalFacts", "ErrorGain", "ErrorFigures", "MeasuredFigures", "ChannelMeasured",
           "PredictedFigures", "PredictionCoverage", "ChannelRow", "Analysis"]


def _plain(value):
    """A fresh copy of ``value`` built from dicts and lists only (tuples become lists)."""
    if isinstance(value, Mapping):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def _pick(obj, names):
    """``{name: obj.name}`` for ``names``, in that order."""
    return {name: getattr(obj, name) for name in names}


@dataclass(frozen=True, repr=False, eq=False)
class ReportSettings:
    """The settings a conversion ran with.

    The JSON form is exactly :meth:`requant.recipe.Recipe.to_dict` with its
    ``shaping_coeffs`` replaced by the coefficients applied, plus
    ``dither_applied`` and ``block_frames``.

    Parameters
    ----------
    recipe : mapping
        :meth:`Recipe.to_dict` of the recipe as asked for, with its seed.
    shaping_coeffs : tuple of float
        Feedback coefficients applied at the file's sample rate (empty when
        unshaped).
    dither_applied : str
        The dither actually added: ``'none'`` for an input written unchanged
        (pass-through), else the recipe's dither.
    block_frames : int, frames
        Frames per block (the output does not depend on it).
    """

    recipe: Mapping[str, Any]
    shaping_coeffs: tuple[float, ...]
    dither_applied: str
    block_frames: int

    @property
    def bits(self) -> int:
        """Target word length, bits."""
        return self.recipe["bits"]

    @property
    def quantizer(self) -> str:
        """``'round'`` or ``'truncate'``."""
        return self.recipe["quantizer"]

    @property
    def dither(self) -> str:
        """The dither asked for (see :attr:`dither_applied` for the one added)."""
        return self.recipe["dither"]

    @property
    def shaping(self) -> str:
        """The kind of noise shaping asked for (``'none'``, ``'hearing'``, ...)."""
        return self.recipe["shaping"]

    @property
    def seed(self) -> int | None:
        """The dither seed (drawn and recorded when none was given)."""
        return self.recipe["seed"]

    @property
    def force_dither(self) -> bool:
        """Whether dither was forced onto an input already on the output grid."""
        return self.recipe["force_dither"]

    def to_dict(self) -> dict[str, Any]:
        """The JSON form: the recipe's keys in its order, then the two extras."""
        out = _plain(self.recipe)
        out["shaping_coeffs"] = list(self.shaping_coeffs)
        out["dither_applied"] = self.dither_applied
        out["block_frames"] = self.block_frames
        return out


@dataclass(frozen=True, repr=False, eq=False)
class InputFacts:
    """What was read.

    Parameters
    ----------
    path : str
    format : str
        Container as libsndfile names it (``'WAV'``, ``'FLAC'``, ...).
    sample_rate : int, Hz
    channels : int
    frames : int, frames
        Frames converted (fewer than the header declares if the file is cut).
    duration_s : float, s
    subtype : str
        Sample encoding (``'PCM_24'``, ``'FLOAT'``, ...).
    declared_frames : int, frames
        What the file's header declares (WAV/AIFF); more than ``frames`` when
        the file was cut short. Equal to ``frames`` for other containers.
    """

    path: str
    format: str
    sample_rate: int
    channels: int
    frames: int
    duration_s: float
    subtype: str
    declared_frames: int

    @property
    def truncated(self) -> bool:
        """The file holds fewer frames than its header declares."""
        return self.declared_frames > self.frames

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        return _pick(self, ("path", "format", "sample_rate", "channels", "frames", "duration_s",
                            "subtype", "declared_frames"))


@dataclass(frozen=True, repr=False, eq=False)
class MetadataRecord:
    """What became of the source's metadata (when it was carried over).

    Parameters
    ----------
    copied, rewritten, dropped : tuple of str
        WAV chunk ids copied unchanged, copied with changes (``bext`` gains a
        coding-history row) and left out.
    tags : tuple of str
        Names of the text tags written (title, artist, ...).
    error : str, optional
        Why the chunks could not be carried, in one sentence; absent from the
        JSON form when None.
    """

    copied: tuple[str, ...] = ()
    rewritten: tuple[str, ...] = ()
    dropped: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()
    error: str | None = None

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> MetadataRecord:
        """The record from its dictionary form, as
        :class:`~requant.audio_io.metadata.CarryMetadata` returns it."""
        return cls(copied=tuple(data.get("copied", ())),
                   rewritten=tuple(data.get("rewritten", ())),
                   dropped=tuple(data.get("dropped", ())), tags=tuple(data.get("tags", ())),
                   error=data.get("error"))

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        out = {k: list(v) for k, v in _pick(self, ("copied", "rewritten", "dropped",
                                                    "tags")).items()}
        if self.error is not None:
            out["error"] = self.error
        return out


@dataclass(frozen=True, repr=False, eq=False)
class OutputFacts:
    """What was written.

    Parameters
    ----------
    path : str
    format : str
        Container written (``'RF64'`` for a WAV too large for RIFF).
    subtype : str
        Sample encoding of the container (``'PCM_16'``, ``'PCM_24'``, ...).
    bits : int, bits
        Target word length.
    container_bits : int, bits
        Width of the container's samples (the codes are left-justified).
    passthrough : bool
        The input already lay on the target grid and was written unchanged.
    metadata : MetadataRecord, optional
        Only when metadata was carried over (batches); absent from the JSON
        form when None.
    """

    path: str
    format: str
    subtype: str
    bits: int
    container_bits: int
    passthrough: bool
    metadata: MetadataRecord | None = None

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        out = _pick(self, ("path", "format", "subtype", "bits", "container_bits",
                           "passthrough"))
        if self.metadata is not None:
            out["metadata"] = self.metadata.to_dict()
        return out


@dataclass(frozen=True, repr=False, eq=False)
class ErrorGain:
    """How loud the error signal was written.

    Parameters
    ----------
    gain_db : float, dB
        Gain applied to the error before writing (0 when exact).
    rule : str
        ``'exact'`` (unity gain, nothing limited: the file holds output minus
        input exactly), ``'fixed'`` (the gain asked for) or ``'auto'`` (flat
        TPDF noise of the word length raised to about -40 dBFS RMS).
    cap_dbfs : float or None, dBFS
        The hard limit on the written samples' peaks; None when exact.
    limited_samples : int
        Samples the cap clipped.
    """

    gain_db: float = 0.0
    rule: str = "exact"
    cap_dbfs: float | None = None
    limited_samples: int = 0

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        return _pick(self, ("gain_db", "rule", "cap_dbfs", "limited_samples"))


@dataclass(frozen=True, repr=False, eq=False)
class ErrorSignalFacts:
    """The error signal written (output minus input, 32-bit float).

    Parameters
    ----------
    path : str
    format : str
        ``'WAV'``, ``'RF64'`` or ``'AIFF'``.
    subtype : str, default 'FLOAT'
    gain : ErrorGain, default exact
        The gain it was written with, and the cap.
    """

    path: str
    format: str
    subtype: str = "FLOAT"
    gain: ErrorGain = ErrorGain()

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        out = _pick(self, ("path", "format", "subtype"))
        out["gain"] = self.gain.to_dict()
        return out


_ERROR_KEYS = ("snr_db", "error_power_lsb2", "error_mean_lsb", "error_rms_dbfs",
               "signal_rms_dbfs", "error_peak_dbfs", "clipped_samples")
_TRUE_PEAK_KEYS = ("input_true_peak_dbtp", "output_true_peak_dbtp")


@dataclass(frozen=True, repr=False, eq=False)
class ErrorFigures:
    """Figures measured from the running sums (:func:`requant.dsp.figures.measured_figures`).

    Figures with no finite value (digital silence, no error at all, no
    frames) are None.

    Parameters
    ----------
    snr_db : float or None, dB
        Signal power over error power.
    error_power_lsb2 : float or None, LSB²
        Mean square of the error.
    error_mean_lsb : float or None, LSB
        Mean of the error (the bias of truncation).
    error_rms_dbfs, signal_rms_dbfs : float or None, dBFS
    error_peak_dbfs : float or None, dBFS
        Largest error magnitude.
    clipped_samples : int
        Output samples held at the end of the range.
    """

    snr_db: float | None
    error_power_lsb2: float | None
    error_mean_lsb: float | None
    error_rms_dbfs: float | None
    signal_rms_dbfs: float | None
    error_peak_dbfs: float | None
    clipped_samples: int


@dataclass(frozen=True, repr=False, eq=False)
class MeasuredFigures(ErrorFigures):
    """Measured figures of all channels together.

    Parameters
    ----------
    over_full_scale_samples : int
        Input samples beyond full scale (clipped).
    shaping_overloads : int
        Times the noise-shaping loop's fed-back error was bounded.
    silent_frames : int
        Samples kept digitally silent (``silence = 'keep'``), all channels
        together: a frame silent in two channels counts twice. Their codes and
        error are exact zeros, and the predictions cover the other samples only.
    a_weighted_noise_dbfs : float or None, dBFS
        Error weighted by the A-curve (IEC 61672-1).
    itu468_noise_dbfs : float or None, dBFS
        Error weighted by the ITU-R BS.468-4 curve, RMS detector.
    threshold_weighted_noise_dbfs : float or None, dBFS
        Error weighted by the inverse of Terhardt's (1979) hearing threshold,
        1 at 1 kHz (:mod:`requant.dsp.weighting`): the figure the ``hearing``
        shaper lowers while the others rise.
    tonal_fraction : float or None
        Share of the error power in tones (whole file).
    correlation_fraction : float or None
        Share of the error power explained by a linear function of the input.
    correlated_error_fraction : float or None
        The larger share that follows the signal, of the whole file and of
        its quietest passage.
    input_true_peak_dbtp, output_true_peak_dbtp : float or None, dBTP
        ITU-R BS.1770-4 Annex 2.
    signal_correlated : bool or None
        Whether the error follows the signal: ``correlated_error_fraction``
        passes the warning threshold, or the requantization was undithered and
        a passage (or the whole file) was quiet enough for its error to be a
        function of the signal whatever the shares say.
    signal_correlated_reason : str or None
        Why the flag is set: ``'measured'`` (the share passes the threshold)
        or ``'quiet-undithered'`` (no dither, a passage within about 6 dB of
        1 LSB RMS); None when it is not set.

    Notes
    -----
    The fields from ``a_weighted_noise_dbfs`` on come from the analysis: None
    without it, and left out of :meth:`to_dict` then.
    """

    over_full_scale_samples: int = 0
    shaping_overloads: int = 0
    silent_frames: int = 0
    a_weighted_noise_dbfs: float | None = None
    itu468_noise_dbfs: float | None = None
    threshold_weighted_noise_dbfs: float | None = None
    tonal_fraction: float | None = None
    correlation_fraction: float | None = None
    correlated_error_fraction: float | None = None
    input_true_peak_dbtp: float | None = None
    output_true_peak_dbtp: float | None = None
    signal_correlated: bool | None = None
    signal_correlated_reason: str | None = None

    def to_dict(self, *, analysed: bool, true_peak: bool) -> dict[str, Any]:
        """The JSON form.

        Parameters
        ----------
        analysed : bool
            Include the analysis' figures.
        true_peak : bool
            Include the true peaks (the analysis metered them).
        """
        names = _ERROR_KEYS + ("over_full_scale_samples", "shaping_overloads", "silent_frames")
        if analysed:
            names += ("a_weighted_noise_dbfs", "itu468_noise_dbfs",
                      "threshold_weighted_noise_dbfs", "tonal_fraction",
                      "correlation_fraction", "correlated_error_fraction")
        if true_peak:
            names += _TRUE_PEAK_KEYS
        if analysed:
            names += ("signal_correlated", "signal_correlated_reason")
        return _pick(self, names)


@dataclass(frozen=True, repr=False, eq=False)
class ChannelMeasured(ErrorFigures):
    """Measured figures of one channel.

    Parameters
    ----------
    silent_frames : int
        Frames of this channel kept digitally silent.
    a_weighted_noise_dbfs, itu468_noise_dbfs, threshold_weighted_noise_dbfs : float or None, dBFS
        As in :class:`MeasuredFigures`.
    correlated_error_fraction : float or None
        The larger of the channel's tonal and linear shares (whole file).
    input_dc_offset, output_dc_offset : float or None
        Mean of the input and of the output, fraction of full scale.
    input_true_peak_dbtp, output_true_peak_dbtp : float or None, dBTP

    Notes
    -----
    The fields from ``a_weighted_noise_dbfs`` on come from the analysis' spectra:
    None without the analysis, or when the file is shorter than one analysis
    segment, and left out of :meth:`to_dict` then.
    """

    silent_frames: int = 0
    a_weighted_noise_dbfs: float | None = None
    itu468_noise_dbfs: float | None = None
    threshold_weighted_noise_dbfs: float | None = None
    correlated_error_fraction: float | None = None
    input_dc_offset: float | None = None
    output_dc_offset: float | None = None
    input_true_peak_dbtp: float | None = None
    output_true_peak_dbtp: float | None = None

    def to_dict(self, *, analysed: bool, true_peak: bool) -> dict[str, Any]:
        """The JSON form (see :meth:`MeasuredFigures.to_dict`)."""
        names = _ERROR_KEYS + ("silent_frames",)
        if analysed:
            names += ("a_weighted_noise_dbfs", "itu468_noise_dbfs",
                      "threshold_weighted_noise_dbfs", "correlated_error_fraction",
                      "input_dc_offset", "output_dc_offset")
        if true_peak:
            names += _TRUE_PEAK_KEYS
        return _pick(self, names)


@dataclass(frozen=True, repr=False, eq=False)
class PredictedFigures:
    """Figures the dither model and the noise-shaping filter predict.

    Parameters
    ----------
    snr_db : float or None, dB
        Measured signal power over the predicted error power.
    error_power_lsb2 : float, LSB²
        Predicted error power per sample (0 for a pass-through).
    error_rms_dbfs : float or None, dBFS
    a_weighted_noise_dbfs, itu468_noise_dbfs, threshold_weighted_noise_dbfs : float or None, dBFS
        From the analysis (None without it, and for a pass-through).
    """

    snr_db: float | None
    error_power_lsb2: float | None
    error_rms_dbfs: float | None
    a_weighted_noise_dbfs: float | None = None
    itu468_noise_dbfs: float | None = None
    threshold_weighted_noise_dbfs: float | None = None

    def to_dict(self, *, analysed: bool) -> dict[str, Any]:
        """The JSON form; the weighted figures only when ``analysed``."""
        names = ("snr_db", "error_power_lsb2", "error_rms_dbfs")
        if analysed:
            names += ("a_weighted_noise_dbfs", "itu468_noise_dbfs",
                      "threshold_weighted_noise_dbfs")
        return _pick(self, names)


@dataclass(frozen=True, repr=False, eq=False)
class PredictionCoverage:
    """Which samples the prediction covers, and measured against predicted over them.

    The dither model predicts the error of samples that were requantized; some
    samples have an error that is known for another reason, and the figures of
    the whole file differ from the model by them. All channels together.

    Parameters
    ----------
    samples : int
        Samples in the file (frames × channels).
    covered_samples : int
        Samples the prediction covers: the others less those below (0 for a
        pass-through, which requantizes nothing).
    silent_samples : int
        Kept digitally silent: exact zeros, no error.
    clipped_samples : int
        Clipped at the ends of the output's range: their error is not
        requantization noise.
    unchanged_samples : int or None
        Without dither: samples already on the output grid, which rounding
        passes unchanged (no error). None when dithered or not analysed.
    clipped_beyond_model_samples : int or None
        Of the clipped samples, those whose error exceeds what dither can make
        (left out of the measured figures here; a clipped sample within that
        bound cannot be told apart and weighs little). None when not analysed.
    measured : mapping or None
        Over the covered samples: ``error_power_lsb2`` (LSB²),
        ``error_rms_dbfs``, ``a_weighted_noise_dbfs``, ``itu468_noise_dbfs``,
        ``threshold_weighted_noise_dbfs`` (dBFS); None when not analysed.
    predicted : mapping
        The model per covered sample, the same keys (the weighted ones None
        when not analysed).
    """

    samples: int
    covered_samples: int
    silent_samples: int = 0
    clipped_samples: int = 0
    unchanged_samples: int | None = None
    clipped_beyond_model_samples: int | None = None
    measured: Mapping[str, Any] | None = None
    predicted: Mapping[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        """The JSON form."""
        out = _pick(self, ("samples", "covered_samples", "silent_samples", "clipped_samples",
                           "unchanged_samples", "clipped_beyond_model_samples"))
        out["measured"] = None if self.measured is None else _plain(self.measured)
        out["predicted"] = None if self.predicted is None else _plain(self.predicted)
        return out


@dataclass(frozen=True, repr=False, eq=False)
class ChannelRow:
    """One channel's measured and predicted figures.

    Parameters
    ----------
    channel : int
        1-based.
    measured : ChannelMeasured
    predicted : PredictedFigures
    """

    channel: int
    measured: ChannelMeasured
    predicted: PredictedFigures

    def to_dict(self, *, analysed: bool, true_peak: bool, weighted: bool) -> dict[str, Any]:
        """The JSON form.

        Parameters
        ----------
        analysed : bool
            Include the measured analysis figures.
        true_peak : bool
            Include the measured true peaks.
        weighted : bool
            Include the predicted weighted noise.
        """
        return {"channel": self.channel,
                "measured": self.measured.to_dict(analysed=analysed, true_peak=true_peak),
                "predicted": self.predicted.to_dict(analysed=weighted)}


@dataclass(frozen=True, repr=False, eq=False)
class Analysis:
    """The streaming analysis' own section (:meth:`requant.dsp.analysis.ErrorAnalyzer.finish`).

    Parameters
    ----------
    method : mapping
        How the error was analysed: ``psd``, ``segment_frames`` (frames),
        ``segments_per_channel``, ``segment_stride``,
        ``frequency_resolution_hz`` (Hz), ``itu468_detector``, ``per_bin``,
        ``tone_measure``.
    spectrum : mapping or None
        ``band_centers_hz`` (Hz), ``measured_dbfs_per_bin`` (per band, per
        channel) and ``predicted_dbfs_per_bin`` (dBFS per bin), ``bands``;
        None when the file is too short for one segment.
    quietest_passage : mapping or None
        ``start_s``, ``duration_s`` (s), ``signal_rms_dbfs``,
        ``error_rms_dbfs`` (dBFS), ``error_power_lsb2``,
        ``predicted_error_power_lsb2`` (LSB²), ``error_power_deviation_db``
        (dB), the correlated shares and ``signal_tonal_fraction`` (the
        passage's own share of power in spectral lines: under
        :data:`requant.dsp.audibility.NOISE_TONAL_MAX` it is noise); None when
        none was found.
    histogram : mapping
        ``edges_lsb`` (LSB), ``counts``, ``outside``.
    dc_offset : mapping
        ``input`` and ``output``: per channel, fractions of full scale.
    true_peak : mapping, optional
        ``input_dbtp``, ``output_dbtp`` and their ``_per_channel`` lists
        (dBTP): the larger of the ITU-R BS.1770-4 reading and the sample
        peak; ``input_meter_dbtp``, ``output_meter_dbtp`` (the interpolator's
        own readings), ``input_sample_peak_dbfs``, ``output_sample_peak_dbfs``
        (null when below the output's reading), ``shown``; absent from the
        JSON form when None (not metered).
    loudness : mapping, optional
        ITU-R BS.1770-4 integrated loudness (LUFS) and EBU Tech 3342 loudness
        range (LU) of the input and the output: ``input_integrated_lufs``,
        ``output_integrated_lufs``, ``input_range_lu``, ``output_range_lu``
        (each None when undefined), ``channel_layout`` and
        ``channel_weights``; absent from the JSON form when None (not
        measured, or a rate too low for K-weighting).
    """

    method: Mapping[str, Any]
    spectrum: Mapping[str, Any] | None
    quietest_passage: Mapping[str, Any] | None
    histogram: Mapping[str, Any]
    dc_offset: Mapping[str, Any]
    true_peak: Mapping[str, Any] | None = None
    loudness: Mapping[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        """The JSON form (fresh lists and dicts)."""
        out = {"method": self.method, "spectrum": self.spectrum,
               "quietest_passage": self.quietest_passage, "histogram": self.histogram}
        if self.true_peak is not None:
            out["true_peak"] = self.true_peak
        if self.loudness is not None:
            out["loudness"] = self.loudness
        out["dc_offset"] = self.dc_offset
        return _plain(out)


@dataclass(frozen=True, repr=False, eq=False)
class Report:
    """The report of one conversion.

    Parameters
    ----------
    requant_version : str
    created : str
        ISO 8601 UTC time, to the second.
    settings : ReportSettings
    input : InputFacts
    output : OutputFacts
    error_signal : ErrorSignalFacts or None
        None when no error signal was written.
    lsb : float
        One LSB of the output word length, fraction of full scale
        (``2**-(bits-1)``).
    measured : MeasuredFigures
        All channels together.
    predicted : PredictedFigures
        All channels together.
    channels : tuple of ChannelRow
    warnings : tuple of str
        Sentences about problems the user should act on.
    notes : tuple of str
        Sentences that explain the figures.
    analysis : Analysis or None
        None when the analysis did not run; the JSON form then has no
        ``analysis`` key and no analysis figures.
    preparation : mapping or None
        What happened before the quantizer (channels, rate, gain, true-peak
        ceiling; :class:`requant.dsp.prepare.PreparedFacts` plus
        ``frames_out``); None, and no ``preparation`` key in JSON, when nothing
        did.
    coverage : PredictionCoverage or None
        Which samples the prediction covers (``prediction_coverage`` in JSON,
        after ``predicted``); None only for reports built without it.

    Notes
    -----
    The JSON form states a channel's analysis figures only when the analysis
    measured spectra (a file shorter than one analysis segment has none, and
    then no per-channel weighted noise, DC offset or true peak either); a
    pass-through still states its per-channel predicted weighted noise, as
    null. Both as the report has always been written.
    """

    requant_version: str
    created: str
    settings: ReportSettings
    input: InputFacts
    output: OutputFacts
    error_signal: ErrorSignalFacts | None
    lsb: float
    measured: MeasuredFigures
    predicted: PredictedFigures
    channels: tuple[ChannelRow, ...] = ()
    warnings: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    analysis: Analysis | None = None
    preparation: Mapping[str, Any] | None = None
    coverage: PredictionCoverage | None = None

    @property
    def sample_rate(self) -> int:
        """The delivered sample rate, Hz: the input's, unless the rate was converted."""
        if self.preparation is not None and self.preparation.get("rate_out"):
            return int(self.preparation["rate_out"])
        return self.input.sample_rate

    @property
    def analysed(self) -> bool:
        """Whether the streaming analysis ran (weighted noise, correlation, true peak)."""
        return self.analysis is not None

    def to_dict(self) -> dict[str, Any]:
        """The JSON form of ``--report out.json`` (docs/theory.md), as fresh dicts and lists."""
        analysed = self.analysis is not None
        true_peak = analysed and self.analysis.true_peak is not None
        per_channel = analysed and self.analysis.spectrum is not None
        weighted = per_channel or (analysed and self.output.passthrough)
        out = {
            "requant_version": self.requant_version,
            "created": self.created,
            "settings": self.settings.to_dict(),
            "input": self.input.to_dict(),
            "output": self.output.to_dict(),
            "error_signal": None if self.error_signal is None else self.error_signal.to_dict(),
            "lsb": self.lsb,
            "measured": self.measured.to_dict(analysed=analysed, true_peak=true_peak),
            "predicted": self.predicted.to_dict(analysed=analysed),
            **({} if self.coverage is None
               else {"prediction_coverage": self.coverage.to_dict()}),
            "channels": [ch.to_dict(analysed=per_channel, true_peak=per_channel and true_peak,
                                    weighted=weighted) for ch in self.channels],
            "warnings": list(self.warnings),
            "notes": list(self.notes),
        }
        if analysed:
            out["analysis"] = self.analysis.to_dict()
        if self.preparation is not None:
            out["preparation"] = _plain(self.preparation)
        return out
