"""Audit a delivery against its master: how it was made, and whether it was made well.

``audit_pair(master, delivered)`` (:mod:`.pair`) takes the two files alone and
returns a plain dict: the alignment (offset, gain, polarity), the delivery's
word length, quantizer, dither, noise shaping and its estimated noise transfer
function, whether the error follows the signal, clipped samples, the error
and weighted noise measured beside what the identified method predicts, a
one-sentence verdict and the findings. ``audit_tree(master_dir,
delivered_dir)`` (:mod:`.tree`) pairs two folder trees by relative path and
audits every pair on the batch's executors.

Modules, in the order a pair goes through them: :mod:`.sources` (the two
files), :mod:`.align` (pass 1: coarse offset by streamed cross-correlation,
then the exact offset and the gain), :mod:`.measure` (pass 2: the error, in
the compiled kernel :mod:`requant.dsp.residual`, and the convert report's
streaming analysis), :mod:`.identify` (the method, from the error alone),
:mod:`.verdict` (the words), :mod:`.pair` (the job) and :mod:`.tree`
(folders). The report pages are :mod:`requant.report.audit`.
"""

from requant._lazy import lazy_exports

_EXPORTS = {
    **dict.fromkeys(["audit_pair", "run_audit", "DEFAULT_MAX_SHIFT_S"], "requant.audit.pair"),
    **dict.fromkeys(["audit_tree", "audit_task", "pair_trees"], "requant.audit.tree"),
}
__all__ = list(_EXPORTS)
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
