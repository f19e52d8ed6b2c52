"""Inspect's hot loop: every per-sample figure of a block in one pass.

For each channel of a frame-interleaved block this keeps, carried from block
to block: the samples exactly 0, NaN or infinite, above full scale; the
largest magnitude, the largest and smallest value; the runs of samples at
full scale (clipping); the smallest grid ``2^-(b-1)`` every sample lies on
(float blocks) or the OR of the codes (integer blocks); and per noise-floor
block of ``floor_len`` frames, counted from the start of the file, the sums of
the samples and of their squares and whether it holds a nonzero sample. A
completed floor block's sum of squares and that flag are written out for the
level histogram (:mod:`requant.inspection`); the running totals add each
completed block's sums in order.

Lanes
-----
Most figures are kept per *lane* rather than per channel: the samples of a
floor block, counted in interleaved order from its first, go round-robin to
:func:`lane_count` lanes (4 when the channel count divides 4, so that lane
``l`` always holds channel ``l % nch``; else one lane per channel). Four
lanes side by side are what the compiler turns into vector instructions
(the family is compiled with the SLP vectorizer). A lane's sums within a
floor block are added in sample order, and a channel's block sum is its
lanes' sums added in lane order, so every figure is the same, bit for bit,
whatever the block boundaries. :func:`merge_lanes` gives the per-channel
figures. Clipping runs are counted per channel, in sample order: a group of
four samples goes the exact sample-by-sample way whenever one of them is at
full scale, NaN, infinite, off the current grid, or a run is open.

Samples that are NaN or infinite count in ``nonfinite`` and are taken as 0
for every other figure (they are not silent). Integer blocks are
left-justified int32 codes: ``scale = 2**-31`` gives full scale.

Buffers are flat, frame ``i`` of channel ``c`` at ``i*nch + c``, so the same
source compiles for raw pointers (:mod:`requant.dsp.native`) and runs as a
plain-Python twin on arrays (the tests compare the two).
"""

import numpy as np

from requant.dsp.native import plain_twin

__all__ = ["LANE_FIELDS", "CHANNEL_FIELDS", "SIGNATURE", "build", "lane_count", "merge_lanes",
           "scan_block_plain"]

#: Per lane (``lanes[field*max(4, nch) + l]``: field by field, the lanes side by side),
#: carried from block to block.
LANE_FIELDS = ("silent", "nonfinite", "overs", "vmax", "vmin", "grid_bits", "grid_scale",
               "part1", "part2", "mark")
#: Per channel (``chans[c*len(CHANNEL_FIELDS) + field]``), carried from block to block.
CHANNEL_FIELDS = ("clipped", "clip_runs", "clip_carry", "sum1", "sum2")
_NL = len(LANE_FIELDS)
_NC = len(CHANNEL_FIELDS)

#: The kernel's arguments, in order, declared once for :mod:`requant.dsp.native` (name,
#: type code, least length of an array or condition on a scalar). See :func:`build`.
SIGNATURE = (
    ("x", "f32*|f64*|i32*", "n * nch"),
    ("n", "i64", "n >= 0"),
    ("nch", "i64", "nch >= 1"),
    ("scale", "f64", None),
    ("clip_level", "f64", "0.0 < clip_level <= 1.0"),
    ("clip_run", "i64", "clip_run >= 1"),
    ("grid_cap", "i64", "grid_cap >= 0"),
    ("floor_len", "i64", "floor_len >= 1"),
    ("lanes", "f64*", f"{_NL} * max(4, nch)"),
    ("chans", "f64*", f"{_NC} * nch"),
    ("orb", "u64*", "max(4, nch)"),
    ("ctl", "f64*", "2"),
    ("blocks", "f64*", "2 * nch * ((n + floor_len - 1) // floor_len)"),
)


def lane_count(channels):
    """Lanes the kernel keeps for a channel count: 4 if it divides 4, else one per channel."""
    return 4 if 4 % channels == 0 else channels


def merge_lanes(lanes, orb, channels):
    """Per-channel figures from the lanes' state.

    Parameters
    ----------
    lanes : ndarray, float64, (len(LANE_FIELDS), max(4, channels))
    orb : ndarray, uint64, (lanes,)
    channels : int

    Returns
    -------
    dict of ndarray, (channels,)
        ``silent``, ``nonfinite``, ``overs`` (sums), ``vmax`` (largest),
        ``vmin`` (smallest), ``peak`` (the larger of ``vmax``, ``-vmin`` and 0),
        ``grid_bits`` (largest), ``or_bits``.
    """
    nl = lane_count(channels)
    f = {name: i for i, name in enumerate(LANE_FIELDS)}
    out = {}
    for name, how in (("silent", np.add), ("nonfinite", np.add), ("overs", np.add),
                      ("vmax", np.maximum), ("vmin", np.minimum), ("grid_bits", np.maximum)):
        col = lanes[f[name], :nl]
        out[name] = np.array([how.reduce(col[c::channels]) for c in range(channels)])
    out["peak"] = np.maximum(np.maximum(out["vmax"], -out["vmin"]), 0.0)
    out["or_bits"] = np.array([np.bitwise_or.reduce(orb[c:nl:channels]) for c in
                               range(channels)], dtype=np.uint64)
    return out


def _one_helper(wrap):
    """One sample the exact way (every figure, the clipping runs)."""

    def one(x, e, lane, c, scale, clip_level, clip_run, grid_cap, lanes, w, chans, orb):
        # one sample, the exact way; returns the change in the number of open runs
        raw = x[e]
        if grid_cap == 0:
            orb[lane] |= np.uint64(np.int64(raw) & 0xFFFFFFFF)
        v = scale * np.float64(raw)
        if v == 0.0:
            lanes[lane] += 1.0
        elif v - v != 0.0:  # NaN or infinite: counted, then taken as 0
            lanes[1 * w + lane] += 1.0
            v = 0.0
        elif lanes[5 * w + lane] < grid_cap:
            if lanes[5 * w + lane] == 0.0:
                lanes[5 * w + lane] = 1.0
                lanes[6 * w + lane] = 1.0
            g = lanes[6 * w + lane]
            while lanes[5 * w + lane] < grid_cap and v * g != np.floor(v * g):
                lanes[5 * w + lane] += 1.0
                g *= 2.0
                lanes[6 * w + lane] = g
        t = abs(v)
        if v > lanes[3 * w + lane]:
            lanes[3 * w + lane] = v
        if v < lanes[4 * w + lane]:
            lanes[4 * w + lane] = v
        if t > 1.0:
            lanes[2 * w + lane] += 1.0
        lanes[7 * w + lane] += v
        lanes[8 * w + lane] += v * v
        b = c * _NC
        if t >= clip_level and t <= 1.0:
            chans[b + 2] += 1.0
            return 1 if chans[b + 2] == 1.0 else 0
        if chans[b + 2] > 0.0:
            if chans[b + 2] >= clip_run:
                chans[b] += chans[b + 2]
                chans[b + 1] += 1.0
            chans[b + 2] = 0.0
            return -1
        return 0

    one = wrap(one)
    return one


def _fast_helper(wrap):
    """Groups of four samples the fast way, while none needs the exact one."""

    def fast(x, e, end, scale, clip_level, grid_cap, lanes, orb):
        # Groups of four samples (lanes 0..3) from e on, while none needs the exact way:
        # at full scale, NaN or infinite (every compare fails), or off a lane's grid. The
        # lanes' state is held in registers meanwhile, field by field four abreast, which
        # the SLP vectorizer turns into vector instructions. Returns where it stopped.
        z0, z1, z2, z3 = lanes[0], lanes[1], lanes[2], lanes[3]
        h0, h1, h2, h3 = lanes[12], lanes[13], lanes[14], lanes[15]
        m0, m1, m2, m3 = lanes[16], lanes[17], lanes[18], lanes[19]
        a0, a1, a2, a3 = lanes[28], lanes[29], lanes[30], lanes[31]
        b0, b1, b2, b3 = lanes[32], lanes[33], lanes[34], lanes[35]
        g0, g1, g2, g3 = lanes[24], lanes[25], lanes[26], lanes[27]
        # a lane whose grid search is over; one with no nonzero sample yet is never fast
        d0 = lanes[20] >= grid_cap
        d1 = lanes[21] >= grid_cap
        d2 = lanes[22] >= grid_cap
        d3 = lanes[23] >= grid_cap
        n0 = lanes[20] > 0.0
        n1 = lanes[21] > 0.0
        n2 = lanes[22] > 0.0
        n3 = lanes[23] > 0.0
        o0 = orb[0]
        o1 = orb[1]
        o2 = orb[2]
        o3 = orb[3]
        # float samples off every grid (the usual end of the search): no grid test at all
        searching = grid_cap > 0 and not (d0 & d1 & d2 & d3)
        while e + 4 <= end:
            v0 = scale * np.float64(x[e])
            v1 = scale * np.float64(x[e + 1])
            v2 = scale * np.float64(x[e + 2])
            v3 = scale * np.float64(x[e + 3])
            # one test, no branch per lane: below full scale (so finite: NaN fails every
            # compare) and on each lane's grid (or its search over)
            ok = ((abs(v0) < clip_level) & (abs(v1) < clip_level) & (abs(v2) < clip_level)
                  & (abs(v3) < clip_level))
            if searching:
                r0 = v0 * g0
                r1 = v1 * g1
                r2 = v2 * g2
                r3 = v3 * g3
                ok = ok & (d0 | (n0 & (r0 == np.floor(r0)))) & (d1 | (n1 & (r1 == np.floor(r1))))
                ok = ok & (d2 | (n2 & (r2 == np.floor(r2)))) & (d3 | (n3 & (r3 == np.floor(r3))))
            elif grid_cap == 0:
                o0 |= np.uint64(np.int64(x[e]) & 0xFFFFFFFF)
                o1 |= np.uint64(np.int64(x[e + 1]) & 0xFFFFFFFF)
                o2 |= np.uint64(np.int64(x[e + 2]) & 0xFFFFFFFF)
                o3 |= np.uint64(np.int64(x[e + 3]) & 0xFFFFFFFF)
            if not ok:
                break
            z0 += 1.0 if v0 == 0.0 else 0.0
            z1 += 1.0 if v1 == 0.0 else 0.0
            z2 += 1.0 if v2 == 0.0 else 0.0
            z3 += 1.0 if v3 == 0.0 else 0.0
            h0 = v0 if v0 > h0 else h0
            h1 = v1 if v1 > h1 else h1
            h2 = v2 if v2 > h2 else h2
            h3 = v3 if v3 > h3 else h3
            m0 = v0 if v0 < m0 else m0
            m1 = v1 if v1 < m1 else m1
            m2 = v2 if v2 < m2 else m2
            m3 = v3 if v3 < m3 else m3
            a0 += v0
            a1 += v1
            a2 += v2
            a3 += v3
            b0 += v0 * v0
            b1 += v1 * v1
            b2 += v2 * v2
            b3 += v3 * v3
            e += 4
        lanes[0], lanes[1], lanes[2], lanes[3] = z0, z1, z2, z3
        lanes[12], lanes[13], lanes[14], lanes[15] = h0, h1, h2, h3
        lanes[16], lanes[17], lanes[18], lanes[19] = m0, m1, m2, m3
        lanes[28], lanes[29], lanes[30], lanes[31] = a0, a1, a2, a3
        lanes[32], lanes[33], lanes[34], lanes[35] = b0, b1, b2, b3
        orb[0] = o0
        orb[1] = o1
        orb[2] = o2
        orb[3] = o3
        return e

    fast = wrap(fast)
    return fast


def _close_helper(wrap):
    """A completed floor block: each channel's sums, its flag, the lanes reset."""

    def close_block(nch, nl, w, frames, lanes, chans, blocks, k):
        # floor block k (``frames`` frames) is complete: each channel's sums from its lanes,
        # in lane order; it is live when fewer of its samples are 0 (or taken as 0) than
        # it holds
        for c in range(nch):
            s1 = lanes[7 * w + c]
            s2 = lanes[8 * w + c]
            dead = lanes[c] + lanes[w + c] - lanes[9 * w + c]
            lane = c + nch
            while lane < nl:
                s1 += lanes[7 * w + lane]
                s2 += lanes[8 * w + lane]
                dead += lanes[lane] + lanes[w + lane] - lanes[9 * w + lane]
                lane += nch
            blocks[(k * nch + c) * 2] = s2
            blocks[(k * nch + c) * 2 + 1] = 1.0 if dead < frames else 0.0
            chans[c * _NC + 3] += s1
            chans[c * _NC + 4] += s2
        for lane in range(nl):
            lanes[7 * w + lane] = 0.0
            lanes[8 * w + lane] = 0.0
            lanes[9 * w + lane] = lanes[lane] + lanes[w + lane]

    close_block = wrap(close_block)
    return close_block


def build(jit=None):
    """Return the block kernel, its helpers compiled by ``jit``.

    Parameters
    ----------
    jit : callable, optional
        numba's ``njit(inline="always")`` for the compiled kernel; ``None``
        gives the plain-Python twin.
    Returns
    -------
    callable
        ``scan(x, n, nch, scale, clip_level, clip_run, grid_cap, floor_len,
        lanes, chans, orb, ctl, blocks)``:

        x : float32, float64 or int32 [n*nch]
        scale : float, full scale per unit of ``x`` (``2**-31`` for codes)
        clip_level : float; a sample at full scale has ``clip_level <= |x| <= 1``
        clip_run : int; a run of this many or more at full scale is clipping
        grid_cap : int; the grid search stops at this word length (0: none,
            for integer blocks, whose codes are OR-ed into ``orb`` instead)
        floor_len : int, frames per noise-floor block
        lanes : float64 [10*max(4, nch)]; :data:`LANE_FIELDS`, updated (``mark``:
            the samples 0 or taken as 0 before the current floor block)
        chans : float64 [5*nch]; :data:`CHANNEL_FIELDS`, updated
        orb : uint64 [max(4, nch)]; each lane's OR of its codes (int32 blocks)
        ctl : float64 [2]; in: frames already in the current floor block;
            out: the same after the block, and the floor blocks completed
        blocks : float64; out: completed floor block ``k`` of channel ``c``:
            its sum of squares at ``(k*nch + c)*2``, 1.0 if it holds a nonzero
            sample at ``+ 1``
    """
    wrap = (lambda f: f) if jit is None else jit
    one = _one_helper(wrap)
    fast = _fast_helper(wrap)
    close_block = _close_helper(wrap)

    def scan(x, n, nch, scale, clip_level, clip_run, grid_cap, floor_len, lanes, chans, orb, ctl,
             blocks):
        nl = 4 if 4 % nch == 0 else nch
        w = max(4, nch)
        pos = int(ctl[0])
        cnt = 0
        open_runs = 0
        for c in range(nch):
            if chans[c * _NC + 2] > 0.0:
                open_runs += 1
        i = 0
        while i < n:
            take = min(n - i, floor_len - pos)
            e = i * nch
            end = (i + take) * nch
            f = pos * nch  # the first sample's place in its floor block
            while e < end:
                if nl == 4 and f % 4 == 0 and e + 4 <= end and open_runs == 0:
                    e1 = fast(x, e, end, scale, clip_level, grid_cap, lanes, orb)
                    f += e1 - e
                    e = e1
                    if e + 4 > end:
                        continue
                    for j in range(4):  # the four that stopped it, the exact way
                        open_runs += one(x, e + j, (f + j) % nl, (e + j) % nch, scale, clip_level,
                                         clip_run, grid_cap, lanes, w, chans, orb)
                    e += 4
                    f += 4
                    continue
                open_runs += one(x, e, f % nl, e % nch, scale, clip_level, clip_run, grid_cap,
                                 lanes, w, chans, orb)
                e += 1
                f += 1
            i += take
            pos += take
            if pos == floor_len:
                close_block(nch, nl, w, floor_len, lanes, chans, blocks, cnt)
                pos = 0
                cnt += 1
        ctl[0] = float(pos)
        ctl[1] = float(cnt)

    return scan


#: The plain-Python twin of the compiled kernel, for tests (small inputs).
scan_block_plain = plain_twin(build)
