"""Pure computation on arrays: no files, no printing.

:mod:`.kernel` is the one hot loop (dither, error-feedback shaping,
quantization, the integer cast) and :mod:`.native` loads it as cached machine
code; :mod:`.quantizer` is the array API around it (``Requantizer``, the
dither models and the predicted error power); :mod:`.shaping` designs and
describes noise-shaping filters; :mod:`.weighting` holds the A, ITU-R BS.468-4
and hearing-threshold curves; :mod:`.truepeak` the ITU-R BS.1770-4 true-peak
meters (their skipping kernels in :mod:`.peakkernel`) and :mod:`.loudness` its
loudness (integrated loudness and the EBU Tech 3342 range, streaming);
:mod:`.scan` is inspect's per-sample kernel, :mod:`.runs` finds its
runs of digital silence, and :mod:`.overlap` runs a kernel
on a second core; :mod:`.cap` the rules for signals raised for listening (the
-6 dBFS cap); :mod:`.analysis` the report's streaming measurements
(with :mod:`.noisemeter`, weighted noise over every sample; :mod:`.levels`, sample
peaks and clipping; :mod:`.tones`, tone measures; :mod:`.correlated`, whether the
error follows the signal);
:mod:`.figures` turns running sums into SNR, LSB² and dBFS; :mod:`.resample`
converts the sample rate (an exact rational polyphase filter, its loop in
:mod:`.ratekernel`).
"""
