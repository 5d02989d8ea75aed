"""Change control: when to replace the bit/power map, and by how much.

:class:`ChangeControl` holds the current allocation and, for each tracked view of the channel,
decides to keep it, repair it with a **bit swap**, **reload** it (run the loader afresh), or make
an **emergency** downshift. It is deterministic: the same tracked inputs and times give the same
decisions and maps.

The rules, per call of :meth:`ChangeControl.decide`, with the *tone margin* of the current map
being ``loader.tone_margin_db(bits, power, effective_snr)`` (0 dB: a tone sits exactly at the
loading target, whose gap already includes the configured target margin):

1. No map yet, a new tone plan, or the first call after a forced fallback map: reload at once.
2. **Emergency**: when at least ``emergency_fraction`` of the loaded tones are below
   ``downshift_margin_db`` at once while the mean tracked SNR has fallen by at least
   ``-downshift_margin_db`` (the band as a whole went down, not the ordinary spread of fading), or
   the mean fell by ``emergency_drop_db``, both since the current map was made, the loader runs on
   the effective SNR lowered by ``emergency_margin_db``. This counts tones below the margin on
   this very call (no persistence) and bypasses the dwell times (not the map rate limit). Normal upgrades recover the rate.
3. **Downgrade**: a loaded tone *stays low* once its margin has been below
   ``downshift_margin_db`` on every call for ``down_persist_s`` (tracked per tone from the time
   it first went below; reset when it recovers or the map changes), or at once when it is more
   than ``down_deep_db`` below that margin (a drop that deep is no estimation noise, and the
   estimator has already confirmed it before it jumps). Any tone that stays low forces a change
   once ``down_dwell_s`` has passed since the last map; the change repairs every tone below the
   margin at that moment. When at most ``swap_max_tones`` tones need to
   change and the rate drops by at most ``swap_max_loss_bits``, a bit swap repairs the map: the
   failing tones drop to the bits their power still carries, and the lost bits move to the tones
   where one more bit costs the least power, within the budget and ceilings. Otherwise (or when
   an upgrade is due as well) the map is reloaded.
4. **Upgrade**: every ``upgrade_check_s`` the loader runs on the effective SNR lowered by
   ``upshift_margin_db``; if even that map carries ``min_gain_bits`` more than the current one,
   the gain is real. Once it has stayed real without a break for its wait the map is reloaded.
   The wait scales with the evidence: ``up_dwell_s`` (longer than the downgrade dwell) for a
   gain of ``min_gain_bits``, ``up_dwell_s * min_gain_bits / gain`` for a larger one (the gain
   of the latest check), so a channel that clearly came back (a fade that ended, an emergency
   map far below what the channel now carries) is used again within a few checks, while a gain
   just above the threshold, which estimation noise can make, waits the whole dwell. The wait
   restarts at every upgrade, emergency and first map; bit swaps and downgrade reloads do not
   restart it, or a fading channel that keeps needing repairs would never be upgraded.

5. **Common mode** (one decision for the whole band): per call, the change of every loaded
   tone's effective SNR since the map was made is split into the band's *common shift* (the
   median over loaded tones) and each tone's own part. When at least half of the loaded tones
   lie within ``common_drop_db`` of the median, the band moved together: the per-tone rules
   (persistence, bit swap) judge each tone by its own part only, and once the common shift
   reaches ``-common_drop_db`` one reload repairs the band (reason ``band fell ...``). A slow
   drift of the gain, or a step of the outer margin loop's offset, is thus one reload per
   ``common_drop_db``, not a stream of single-tone swaps as the lowest tones cross the margin
   one by one. Emergencies still count every tone below the downshift margin.
6. **Sag bound**: when the median margin of the loaded tones has stayed below ``-sag_db`` for
   ``sag_max_s`` the map is reloaded, so the map never sits far below its target margin for
   long, whatever the per-tone and common-mode rules let pass.
7. **Batching**: a bit swap repairs every tone below the downshift margin at that moment,
   whether it fell by itself or with the band.
8. **Lookahead** (``lookahead_s``): the effective SNR change control works on is each tone's
   tracked effective SNR moved ``lookahead_s`` ahead along its present downward slope (slope:
   first-order smoothing of the per-call change with time constant ``slope_tau_s``, pooled over
   9 neighbouring tones, which a fade moves together and noise does not; rising tones are not
   extrapolated; a jump deeper than ``down_deep_db`` in one call is a step, not a trend, and
   restarts that tone's slope; the fall is at most ``emergency_drop_db``). A map rate limit
   means a map stays in force for at least ``1 / max_maps_per_s``; without lookahead, tones in
   a fade sink below the raw gap while the next map waits. On a static or slowly drifting
   channel the slope is near zero and nothing changes. The trade-off is visible in the
   benchmark (``fading1hz_*``: outage and rate with and without change control). Where the
   estimator already predicted the channel (``Tracked.predicted_s`` > 0: each tone at its
   predicted worst over the map's life) there is no lookahead: extrapolating the slope of a
   prediction again would count a fall twice.

9. **Outer loop offset** (``decide(..., offset_db=...)``, from the link controller's outer
   margin loop): every tone's effective SNR is lowered by the offset after the lookahead (so a
   step of the offset is no slope); a rise of the offset is a common fall of the band (rule 5);
   a fall by ``common_drop_db`` since the map was made reloads at once, without the upgrade's
   evidence and dwell, because the offset is the loop's decision, not a noisy estimate.
   Without that, the upgrade hysteresis holds the map below the loop's offset, the offset
   runs into its lower bound, and the frame error rate settles below the target.

Separate upshift and downshift margins with minimum times follow the idea of DSL online rate
adaptation (ITU-T G.997.1, as described in IETF RFC 5650): the map moves down fast when the
link is failing and up slowly, only for a clear gain; the downshift persistence
``down_persist_s`` is the time a margin must stay below the downshift margin there, too. No two
maps are closer than ``1 / max_maps_per_s``.

Why persistence: a narrowband interferer makes per-frame estimate errors heavier-tailed and
correlated across neighbouring tones, so a tone whose margin sits near the downshift margin dips
below it for a frame or two now and then; without persistence each dip was a bit swap. A few
frame times filter those dips, while a real drop waits at most ``down_persist_s`` and a deep one
not at all. Spells where the per-frame estimates alternate between two states stay beyond any
persistence of a few frames.

Every decision names the rule that made it in ``Decision.cause`` (one key for machines; the
reason says it in words), and a reload that repairs tones below the downshift margin names the
limit that ruled out a bit swap (``swap_tones``, ``swap_loss``, ``swap_power``, ``swap_off``).
A reload's reason follows the direction of the change: one that carries more bits than the
map it replaces starts with the gain (``reload: +124 bits (...), made for: band fell ...``), so
a reload called for by a fall of some tones that loads back more elsewhere never reads as a
downgrade; any other ends with its bit change.

Every map published here satisfies the loader's constraints: power within the budget, every tone
within the ceiling, bits from the allowed set (reloads come from the loader; bit swaps only move
a tone between allowed levels at its required power and check the totals).
"""

from __future__ import annotations

import math
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from brimline.daemon.core.loading import uniform_margin_db
from brimline.daemon.errors import InfeasibleError
from brimline.daemon.limits import FINITE, NON_NEGATIVE, POSITIVE, at_least, between, check_values
from brimline.daemon.records import Allocation, Decision, DecisionKind, Tracked

__all__ = ["ChangeControl", "CHANGE_LIMITS", "check_change_settings"]

#: The limit of each keyword argument of :class:`ChangeControl` (besides ``loader``), checked by
#: the constructor and by the ``change:`` config section alike (the defaults are the
#: constructor's own). The rules between keys are :func:`check_change_settings`'s.
CHANGE_LIMITS = MappingProxyType({
    "downshift_margin_db": FINITE,
    "upshift_margin_db": FINITE,
    "min_gain_bits": at_least(0),
    "down_dwell_s": NON_NEGATIVE,
    "down_persist_s": NON_NEGATIVE,
    "down_deep_db": at_least(0, allow_inf=True),  # inf: every drop waits for down_persist_s
    "up_dwell_s": NON_NEGATIVE,
    "upgrade_check_s": NON_NEGATIVE,
    "max_maps_per_s": POSITIVE,
    "swap_max_tones": at_least(0),
    "swap_max_loss_bits": at_least(0),
    "emergency_fraction": between(0, 1, low_open=True),
    "emergency_drop_db": POSITIVE,
    "emergency_margin_db": NON_NEGATIVE,
    "common_drop_db": POSITIVE,
    "sag_db": NON_NEGATIVE,
    "sag_max_s": POSITIVE,
    "lookahead_s": NON_NEGATIVE,
    "slope_tau_s": POSITIVE,
})


def check_change_settings(settings: Mapping[str, Any], *, prefix: str = "") -> None:
    """Check change-control settings: each against :data:`CHANGE_LIMITS`, then their order.

    Parameters
    ----------
    settings : mapping
        Keyword arguments of :class:`ChangeControl` (all of them for the rules between keys).
    prefix : str
        Put before each key in messages (``"change."``).

    Raises
    ------
    ValueError
        ``change.max_maps_per_s=0.0 must be a positive finite number``; ``downshift_margin_db``
        not below ``upshift_margin_db``; ``up_dwell_s`` shorter than ``down_dwell_s``.
    """
    check_values(settings, CHANGE_LIMITS, prefix=prefix)
    down, up = settings.get("downshift_margin_db"), settings.get("upshift_margin_db")
    if down is not None and up is not None and not down < up:
        raise ValueError(f"{prefix}downshift_margin_db={down} must be below "
                         f"{prefix}upshift_margin_db={up}")
    down, up = settings.get("down_dwell_s"), settings.get("up_dwell_s")
    if down is not None and up is not None and up < down:
        raise ValueError(f"{prefix}up_dwell_s={up} must be >= {prefix}down_dwell_s={down}")


_KEEP = DecisionKind.KEEP
_sum = np.add.reduce
_SLOPE_KERNEL = np.full(9, 1.0 / 9)   # tones pooled (centred) for the slope of lookahead_s
_MAX_SNR_DB = 100.0   # no tone is better than this; keeps the linear SNR finite


class ChangeControl:
    """Decide, per tracked channel view, whether and how the bit/power map changes.

    Parameters
    ----------
    loader : brimline.daemon.core.loading.Loader
        Builds allocations (``loader(snr_lin)``) and rates them (``required_power``,
        ``tone_margin_db``); its ``bits``, ``budget_db`` and ``cap_db`` bound the bit swaps.
    downshift_margin_db : float
        A loaded tone below this margin forces a change, dB.
    upshift_margin_db : float
        Extra margin an upgrade must still gain with, dB.
    min_gain_bits : int
        Smallest gain in bits per symbol worth an upgrade.
    down_dwell_s : float
        Minimum time since the last map before a downgrade, seconds.
    down_persist_s : float
        A tone counts as below the downshift margin only once it has stayed below it for this
        long (0: at once), seconds.
    down_deep_db : float
        A tone more than this below the downshift margin counts at once, without persistence,
        dB (inf: never).
    up_dwell_s : float
        Time an upgrade of ``min_gain_bits`` must stay worth it without a break before it is
        made (a gain ``k`` times larger waits ``1 / k`` of it), seconds.
    upgrade_check_s : float
        Interval between upgrade evaluations, seconds.
    max_maps_per_s : float
        Map rate limit: no two maps closer than its inverse, seconds.
    swap_max_tones : int
        Most tones a bit swap may change.
    swap_max_loss_bits : int
        Most bits per symbol a bit swap may lose (0 in margin mode, which keeps its target).
    emergency_fraction : float
        Fraction of loaded tones below the downshift margin that makes an emergency.
    emergency_drop_db : float
        Drop of the mean tracked SNR since the current map that makes an emergency, dB.
    emergency_margin_db : float
        Extra margin of the emergency map, dB.
    common_drop_db : float
        A fall of the band's common part (median change of the loaded tones, with at least
        half of them within this of it) by this much since the map is one reload, dB; a fall
        of the outer loop's offset by as much reloads at once as well.
    sag_db : float
        The median margin of the loaded tones below ``-sag_db`` counts as sagging, dB.
    sag_max_s : float
        A map that sagged this long without a break is reloaded, seconds.
    lookahead_s : float
        Maps are made, and margins judged, on each tone's effective SNR this far ahead along
        its present downward slope (0: off), seconds.
    slope_tau_s : float
        Time constant of the per-tone slope tracker behind ``lookahead_s``, seconds.

    Notes
    -----
    The keyword arguments besides ``loader`` are exactly the keys of the ``change:`` config
    section (:class:`brimline.daemon.runtime.config.ChangeSection`). Their defaults here are the
    only ones: the config section takes its defaults from this signature, and its checks from
    :func:`check_change_settings`.
    """

    def __init__(self, loader, *, downshift_margin_db: float = -1.5,
                 upshift_margin_db: float = 1.5, min_gain_bits: int = 4,
                 down_dwell_s: float = 0.1, down_persist_s: float = 0.06,
                 down_deep_db: float = 6.0, up_dwell_s: float = 1.0,
                 upgrade_check_s: float = 0.25, max_maps_per_s: float = 10.0,
                 swap_max_tones: int = 16, swap_max_loss_bits: int = 4,
                 emergency_fraction: float = 0.25, emergency_drop_db: float = 6.0,
                 emergency_margin_db: float = 3.0, common_drop_db: float = 1.0,
                 sag_db: float = 0.5, sag_max_s: float = 5.0, lookahead_s: float = 0.2,
                 slope_tau_s: float = 0.05) -> None:
        settings = dict(locals())  # the keyword arguments, before any other name is bound
        del settings["self"], settings["loader"]
        check_change_settings(settings, prefix="change.")
        self.loader = loader
        self.downshift_margin_db = float(downshift_margin_db)
        self.upshift_margin_db = float(upshift_margin_db)
        self.min_gain_bits = int(min_gain_bits)
        self.down_dwell_s = float(down_dwell_s)
        self.down_persist_s = float(down_persist_s)
        self.down_deep_db = float(down_deep_db)
        self.up_dwell_s = float(up_dwell_s)
        self.upgrade_check_s = float(upgrade_check_s)
        self.max_maps_per_s = float(max_maps_per_s)
        self.swap_max_tones = int(swap_max_tones)
        # Margin mode carries exactly its target: a swap must neither lose nor gain bits.
        self._exact_rate = getattr(loader, "mode", "rate") == "margin"
        if self._exact_rate:
            swap_max_loss_bits = 0
        self.swap_max_loss_bits = int(swap_max_loss_bits)
        self.emergency_fraction = float(emergency_fraction)
        self.emergency_drop_db = float(emergency_drop_db)
        self.emergency_margin_db = float(emergency_margin_db)
        self.common_drop_db = float(common_drop_db)
        self.sag_db = float(sag_db)
        self.sag_max_s = float(sag_max_s)
        self.lookahead_s = float(lookahead_s)
        self.slope_tau_s = float(slope_tau_s)
        self._prev_eff_db = None
        self._prev_s = math.nan
        self._slope_db_s = np.empty(0)
        # What a bit swap must respect; without them (a foreign loader) swaps are off.
        bit_set = getattr(loader, "bits", None)
        self._bit_set = None if bit_set is None else np.asarray(bit_set, dtype=np.int64)
        self._budget_lin = 10.0 ** (float(getattr(loader, "budget_db", math.nan)) / 10.0)
        self._cap_lin = 10.0 ** (float(getattr(loader, "cap_db", math.inf)) / 10.0)
        self._counters = dict.fromkeys(
            ("keep", "bit_swap", "reload", "emergency", "fallback", "forced", "upgrade",
             "held_persist", "held_dwell", "held_rate", "infeasible", "bad_input",
             "common_mode", "sag", "outer"), 0)
        self._current: Allocation | None = None
        self._margin_at_0db = None      # tone margins of the current map at 0 dB SNR
        self._n_loaded = 0
        self._none_below = np.empty(0)   # all NaN, read-only: _low_since_s with no tone below
        self._low_since_s = np.empty(0)  # per tone: when it went below the downshift margin,
        #                                  NaN while it is not below (reset at every map)
        self._plan_id: str | None = None
        self._changed_s = -math.inf     # when the current map was adopted
        self._ref_mean_db = math.nan    # mean tracked SNR when the current map was made
        self._eff_at_map = None          # the effective SNR of the loaded tones the map was
        #                                  made on (after lookahead and offset)
        self._eff_now = np.empty(0)      # the same, on the present call
        self._loaded = np.empty(0, dtype=bool)
        self._loaded_index = np.empty(0, dtype=np.int64)
        self._sag_since_s = math.nan     # since when the median loaded margin is below -sag_db
        self._offset_now = 0.0           # the outer loop's offset on the present call
        self._map_offset_db = 0.0        # ... and when the current map was made
        self._next_upgrade_s = -math.inf
        self._gain_since_s = math.nan   # since when an upgrade has been worth it, continuously
        self._last_gain = 0
        self._checked_s = math.nan

    # ------------------------------------------------------------------ state

    @property
    def current(self) -> Allocation | None:
        """The allocation in force (None before the first map)."""
        return self._current

    @property
    def counters(self) -> dict[str, int]:
        """Decisions by kind, ``upgrade`` reloads, changes held by ``held_persist`` (tones
        below the downshift margin not yet for ``down_persist_s``), ``held_dwell`` /
        ``held_rate``, ``forced`` maps, ``infeasible`` loads (margin mode fell back to rate) and
        ``bad_input`` (a tracked view with NaN or inf, kept without a change)."""
        return dict(self._counters)

    def force(self, allocation: Allocation, kind: DecisionKind | str, reason: str,
              now_s: float) -> Decision:
        """Adopt ``allocation`` unconditionally (e.g. the configured fallback map).

        After a forced ``fallback`` the next :meth:`decide` loads a fresh map as at start.

        Parameters
        ----------
        allocation : Allocation
            The map to put in force.
        kind : DecisionKind or str
            Any kind but ``keep``.
        reason : str
            Shown to operators.
        now_s : float
            Time of the change, seconds; the dwell times run from it.

        Returns
        -------
        Decision
        """
        kind = DecisionKind(kind)
        if kind is _KEEP:
            raise ValueError("force() needs a map-changing kind, not 'keep'")
        decision = self._adopt(kind, allocation, reason, now_s, math.nan, restart_upgrade=True,
                               cause=kind.value)
        self._counters["forced"] += 1
        if kind is DecisionKind.FALLBACK:
            self._plan_id = None
        return decision

    # ------------------------------------------------------------------ decisions

    def decide(self, tracked: Tracked, now_s: float, *, offset_db: float = 0.0) -> Decision:
        """Decide for one tracked view of the channel; adopt the new map unless ``keep``.

        Parameters
        ----------
        tracked : Tracked
            The estimator's view; ``effective_snr_db`` is what loading uses.
        now_s : float
            The caller's clock, seconds.
        offset_db : float
            The outer margin loop's offset, dB: added to the gap (every tone's effective SNR
            is lowered by it after the lookahead). When it has fallen by ``common_drop_db``
            since the current map was made, the map is reloaded at once (map rate limit
            permitting).

        Returns
        -------
        Decision
            With a reason for the status stream; ``allocation`` is the new map (None for keep).
        """
        now_s = float(now_s)
        eff_db = tracked.effective_snr_db
        # (np.add.reduce is what ndarray.sum calls, without its wrapper: this runs per frame)
        snr_sum = _sum(tracked.snr_db)   # also gives the mean below: np.mean is sum / count
        if not (math.isfinite(_sum(eff_db)) and math.isfinite(snr_sum)):
            return self._hold("bad_input", "tracked SNR is not finite: map kept")
        offset_db = float(offset_db) if math.isfinite(offset_db) else 0.0
        # where the estimator predicted the channel, its worst over the map's life replaces
        # the extrapolation of the slope (which would count a fall twice)
        lookahead_s = 0.0 if tracked.predicted_s > 0 else self.lookahead_s
        eff_db = self._ahead(np.minimum(eff_db, _MAX_SNR_DB), now_s, lookahead_s)
        if offset_db != 0.0 or math.copysign(1.0, offset_db) < 0:
            eff_db = eff_db - offset_db   # x - (+0.0) is x: no copy without an outer loop
        self._offset_now = offset_db
        self._eff_now = eff_db   # what a map made on this call is made on
        mean_db = float(snr_sum / tracked.snr_db.size)
        cur = self._current
        since_map = now_s - self._changed_s
        rate_wait = 1.0 / self.max_maps_per_s - since_map

        if cur is None or self._plan_id != tracked.plan_id or cur.bits.size != tracked.n_tones:
            if cur is not None and rate_wait > 0:
                return self._hold("held_rate", f"new map pending: map rate limit "
                                  f"({rate_wait:.2f} s)")
            why = ("first map" if cur is None or self._plan_id is None
                   else f"tone plan changed to {tracked.plan_id}")
            cause = ("first_map" if cur is None else "after_fallback"
                     if self._plan_id is None else "plan_changed")
            self._plan_id = tracked.plan_id
            alloc, note = self._load(_lin(eff_db))
            return self._adopt(DecisionKind.RELOAD, alloc, f"reload: {why}{note}", now_s,
                               mean_db, restart_upgrade=True, cause=cause)

        # With power proportional to 1 / snr for given bits (the SNR-gap model), a tone's margin
        # in dB is its margin at 0 dB SNR plus its SNR in dB: one addition per frame.
        margins = self._margin_at_0db + eff_db
        common_db, n_common = self._common_shift(eff_db)
        coherent = n_common >= 0.5 * self._n_loaded and self._n_loaded > 0
        # A tone's own change is judged per tone; a common fall of the whole band is one
        # decision below (common-mode reload), not a stream of bit swaps tone by tone.
        own = margins - common_db if coherent and common_db < 0 else margins
        below = own < self.downshift_margin_db
        n_below = int(np.count_nonzero(below))
        # Persistence: a tone stays low once below on every call for down_persist_s, or at once
        # when the drop is deeper than down_deep_db; one vectorized update per call.
        if n_below:
            first_s = np.fmin(self._low_since_s, now_s)   # when each tone went below, if now
            since = np.where(below, first_s, np.nan)
            low = below & ((now_s - first_s >= self.down_persist_s - 1e-9)
                           | (margins < self.downshift_margin_db - self.down_deep_db))
            n_low = int(np.count_nonzero(low))
        else:   # nothing below: no tone is low, and none has been below since any time
            since = self._none_below
            n_low = 0
        self._low_since_s = since
        n_loaded = self._n_loaded
        worst = int(margins.argmin())
        worst_db = float(margins[worst])
        worst_text = (f"{worst_db:.1f} dB worst at tone {int(tracked.tone_index[worst])}"
                      if math.isfinite(worst_db) else "no tone loaded")
        if math.isnan(self._ref_mean_db):
            self._ref_mean_db = mean_db
        drop_db = self._ref_mean_db - mean_db

        # Many tones low at once is an emergency when the band as a whole went down; with the
        # mean in place it is the ordinary spread of fading, which a reload handles.
        # Counted on this call alone: a band-wide drop must not wait for persistence.
        n_raw = (int(np.count_nonzero(margins < self.downshift_margin_db)) if own is not margins
                 else n_below)
        broad = (n_raw >= self.emergency_fraction * n_loaded
                 and drop_db >= -self.downshift_margin_db)
        if (n_raw and broad) or drop_db >= self.emergency_drop_db:
            moved = (f"mean SNR fell {drop_db:.1f} dB" if drop_db >= 0
                     else f"mean SNR rose {-drop_db:.1f} dB")
            what = (f"{n_raw} of {_tones(n_loaded)} loaded below downshift margin "
                    f"({worst_text}), {moved} since the map")
            if rate_wait > 0:
                return self._hold("held_rate", f"emergency pending: {what}; map rate limit "
                                  f"({rate_wait:.2f} s)")
            alloc, note = self._load(_lin(eff_db - self.emergency_margin_db))
            return self._adopt(DecisionKind.EMERGENCY, alloc,
                               f"emergency: {what}; new map with {self.emergency_margin_db:g} dB extra"
                               f" margin{note}", now_s, mean_db, restart_upgrade=True,
                               cause="emergency_tones" if n_raw and broad else "emergency_drop")

        # Common mode: the band as a whole fell by common_drop_db since the map (most loaded
        # tones moved together); or the map's median margin sat below -sag_db for sag_max_s.
        median_db = _median(margins[self._loaded_index]) if self._n_loaded else math.inf
        if median_db < -self.sag_db:
            self._sag_since_s = min(self._sag_since_s, now_s) \
                if not math.isnan(self._sag_since_s) else now_s
        else:
            self._sag_since_s = math.nan
        sag_s = now_s - self._sag_since_s if not math.isnan(self._sag_since_s) else 0.0
        band_fell = coherent and common_db <= -self.common_drop_db
        if band_fell or sag_s >= self.sag_max_s:
            key = "common_mode" if band_fell else "sag"
            what = (f"band fell {-common_db:.1f} dB since the map ({n_common} of "
                    f"{_tones(self._n_loaded)} loaded moved together)" if band_fell else
                    f"median margin {median_db:.1f} dB for {sag_s:.1f} s")
            wait = max(self.down_dwell_s - since_map, rate_wait)
            if wait > 0:
                return self._hold("held_dwell" if self.down_dwell_s - since_map >= rate_wait
                                  else "held_rate", f"{what}; reload in {wait:.2f} s")
            alloc, note = self._load(_lin(eff_db))
            self._counters[key] += 1
            return self._adopt(DecisionKind.RELOAD, alloc, _reload_words(what + note, cur, alloc),
                               now_s, mean_db, restart_upgrade=False, cause=key)

        if offset_db <= self._map_offset_db - self.common_drop_db and rate_wait <= 0:
            alloc, note = self._load(_lin(eff_db))
            self._counters["outer"] += 1
            return self._adopt(DecisionKind.RELOAD, alloc, _reload_words(
                f"outer loop offset {offset_db:+.1f} dB, "
                f"{self._map_offset_db - offset_db:.1f} dB below the map's{note}", cur, alloc),
                now_s, mean_db, restart_upgrade=False, cause="outer_offset")

        gain = self._upgrade_gain(eff_db, cur, now_s)
        due = self._upgrade_due(now_s)
        may_change = rate_wait <= 0 and (not n_low or since_map >= self.down_dwell_s)
        if due and may_change and self._checked_s != now_s:
            # confirm on this very view before acting on it
            gain = self._upgrade_gain(eff_db, cur, now_s, now=True)
            due = self._upgrade_due(now_s)
        if n_low:
            # The change repairs every tone below the margin now, persistent or not yet.
            what = f"{_tones(n_below)} below downshift margin ({worst_text})"
            wait = max(self.down_dwell_s - since_map, rate_wait)
            if wait > 0:
                key = "held_dwell" if self.down_dwell_s - since_map >= rate_wait else "held_rate"
                return self._hold(key, f"{what}; change in {wait:.2f} s")
            snr = _lin(eff_db)
            if due:  # an upgrade is due as well: one reload does both
                alloc, note = self._load(snr)
                self._counters["upgrade"] += 1
                return self._adopt(DecisionKind.RELOAD, alloc,
                                   _reload_words(f"{what}; upgrade due{note}", cur, alloc),
                                   now_s, mean_db, restart_upgrade=True,
                                   cause="repair_and_upgrade")
            # The change batches everything due: every tone below the margin, whether by its
            # own fall or by the band's common one.
            due_mask = margins < self.downshift_margin_db
            if n_raw > self.swap_max_tones:
                swap, changed, cause, limit = (
                    None, 0, "swap_tones",
                    f"too many for a bit swap ({n_raw} tones to repair > swap_max_tones "
                    f"{self.swap_max_tones})")
            else:
                swap, changed, cause, limit = self._bit_swap(cur, snr, due_mask)
            if swap is not None:
                delta = swap.total_bits - cur.total_bits
                return self._adopt(DecisionKind.BIT_SWAP, swap,
                                   f"bit swap: {what}; {_tones(changed)} changed, {delta:+d} bits",
                                   now_s, mean_db, restart_upgrade=False, cause=cause)
            alloc, note = self._load(snr)
            return self._adopt(DecisionKind.RELOAD, alloc,
                               _reload_words(f"{what}, {limit}{note}", cur, alloc), now_s,
                               mean_db, restart_upgrade=False, cause=cause)

        if due and rate_wait <= 0:
            alloc, note = self._load(_lin(eff_db))
            self._counters["upgrade"] += 1
            return self._adopt(
                DecisionKind.RELOAD, alloc,
                f"upgrade: {alloc.total_bits - cur.total_bits:+d} bits ({gain:+d} even with "
                f"{self.upshift_margin_db:g} dB more margin for "
                f"{now_s - self._gain_since_s:.1f} s){note}", now_s, mean_db,
                restart_upgrade=True, cause="upgrade")
        if n_below:
            first = float(np.nanmin(since))
            return self._hold("held_persist", f"{_tones(n_below)} below downshift margin "
                              f"({worst_text}) for {now_s - first:.2f} of "
                              f"{self.down_persist_s:g} s")
        if not math.isnan(self._gain_since_s):
            return self._hold("keep", f"margins ok ({worst_text}); upgrade pending for "
                              f"{now_s - self._gain_since_s:.1f} of {self._up_wait_s():.2g} s")
        return self._hold("keep", f"margins ok ({worst_text})")

    def _common_shift(self, eff_db: np.ndarray) -> tuple[float, int]:
        """The band's common change of effective SNR since the map (median over loaded tones),
        dB, and how many loaded tones lie within ``common_drop_db`` of it."""
        if not self._n_loaded or self._eff_at_map is None:
            return 0.0, 0
        delta = eff_db[self._loaded_index] - self._eff_at_map   # both finite: checked before
        shift = _median(delta)
        return shift, int(np.count_nonzero(np.abs(delta - shift) <= self.common_drop_db))

    def _ahead(self, eff_db: np.ndarray, now_s: float, lookahead_s: float) -> np.ndarray:
        prev = self._prev_eff_db
        dt = now_s - self._prev_s
        if prev is None or prev.size != eff_db.size or not dt > 0:
            self._slope_db_s = np.zeros(eff_db.size)
        else:
            a = 1.0 - math.exp(-dt / self.slope_tau_s)
            step_db = eff_db - prev
            rate = step_db / dt   # slope += a * (rate - slope), in place
            rate -= self._slope_db_s
            rate *= a
            self._slope_db_s += rate
            # A jump deeper than down_deep_db in one call is a step (a confirmed drop, a new
            # level), not a trend to extrapolate: that tone's slope starts afresh.
            np.abs(step_db, out=step_db)
            self._slope_db_s[step_db > self.down_deep_db] = 0.0
        self._prev_eff_db, self._prev_s = eff_db, now_s
        if lookahead_s == 0.0:
            return eff_db
        # pooled over neighbouring tones (a fade moves them together, noise does not); zeros
        # beyond the band's edges, so the edge tones are extrapolated a little less
        half = _SLOPE_KERNEL.size // 2
        # (np.convolve is this correlation with the kernel reversed, after argument checks
        # that cost more than the sum; the kernel is symmetric)
        slope = np.correlate(self._slope_db_s, _SLOPE_KERNEL, "full")[half:half + eff_db.size]
        # the fall ahead, min(lookahead_s * max(-slope, 0), emergency_drop_db), in place: at
        # most an emergency drop (a step, a confirmed drop, is not a trend to follow)
        np.negative(slope, out=slope)
        np.maximum(slope, 0.0, out=slope)
        slope *= lookahead_s
        np.minimum(slope, self.emergency_drop_db, out=slope)
        return eff_db - slope

    def _upgrade_due(self, now_s: float) -> bool:
        return not math.isnan(self._gain_since_s) and \
            now_s - self._gain_since_s >= self._up_wait_s()

    def _up_wait_s(self) -> float:
        """The upgrade's wait, scaled by its evidence: ``up_dwell_s`` for a gain of
        ``min_gain_bits``, shorter in proportion for a larger one."""
        return self.up_dwell_s * min(1.0, max(self.min_gain_bits, 1) / max(self._last_gain, 1))

    def _upgrade_gain(self, eff_db: np.ndarray, cur: Allocation, now_s: float, *,
                      now: bool = False) -> int:
        """Every ``upgrade_check_s`` (or ``now``): bits a map with ``upshift_margin_db`` more
        margin would gain over ``cur``; keeps ``_gain_since_s``, the start of the present run of
        checks that found at least ``min_gain_bits``. Between checks, the last gain found."""
        if now or now_s >= self._next_upgrade_s:
            self._next_upgrade_s = now_s + self.upgrade_check_s
            self._checked_s = now_s
            guarded, _ = self._load(_lin(eff_db - self.upshift_margin_db))
            self._last_gain = guarded.total_bits - cur.total_bits
            if self._last_gain < max(self.min_gain_bits, 1):
                self._gain_since_s = math.nan
            elif math.isnan(self._gain_since_s):
                self._gain_since_s = now_s
        return self._last_gain

    # ------------------------------------------------------------------ helpers

    def _hold(self, counter: str, reason: str) -> Decision:
        self._counters[counter] += 1
        if counter != "keep":
            self._counters["keep"] += 1
        return Decision(kind=_KEEP, reason=reason, cause=counter)

    def _adopt(self, kind: DecisionKind, alloc: Allocation, reason: str, now_s: float,
               mean_db: float, *, restart_upgrade: bool, cause: str) -> Decision:
        cur = self._current
        if cur is None or cur.bits.size != alloc.bits.size:
            changed = int(alloc.bits.size)
        else:
            changed = int(np.count_nonzero((cur.bits != alloc.bits) | (cur.power != alloc.power)))
        self._current = alloc
        self._margin_at_0db = self.loader.tone_margin_db(alloc.bits, alloc.power,
                                                         np.ones(alloc.bits.size))
        self._n_loaded = int(np.count_nonzero(alloc.bits))
        self._none_below = np.full(alloc.bits.size, np.nan)
        self._none_below.setflags(write=False)   # shared by every call with no tone below
        self._low_since_s = self._none_below
        self._changed_s = float(now_s)
        self._ref_mean_db = mean_db
        self._loaded = alloc.bits > 0
        self._loaded_index = np.flatnonzero(self._loaded)
        # None (no common mode until the next map) for a forced map not made on this view
        self._eff_at_map = (self._eff_now[self._loaded_index]
                            if self._eff_now.size == alloc.bits.size else None)
        self._sag_since_s = math.nan
        self._map_offset_db = self._offset_now
        self._next_upgrade_s = -math.inf
        if restart_upgrade:
            self._gain_since_s = math.nan
        self._counters[kind.value] += 1
        return Decision(kind=kind, reason=reason, allocation=alloc, tones_changed=changed,
                        cause=cause)

    def _load(self, snr: np.ndarray) -> tuple[Allocation, str]:
        """Run the loader; if a margin-mode target is infeasible, load for rate instead."""
        try:
            return self.loader(snr), ""
        except InfeasibleError:
            rate = getattr(self.loader, "rate", None)
            if rate is None:
                raise
            self._counters["infeasible"] += 1
            return rate(snr), " (target bits infeasible: loaded for rate)"

    def _bit_swap(self, cur: Allocation, snr: np.ndarray,
                  low: np.ndarray) -> tuple[Allocation | None, int, str, str]:
        """Repair ``cur`` by moving bits off the ``low`` tones.

        Returns the repaired allocation (None when a reload is needed), the tones it changed,
        the decision's cause (``tones_low``, or the limit that ruled the swap out: ``swap_off``,
        ``swap_tones``, ``swap_loss``, ``swap_power``) and that limit in words ("" for a swap).

        The failing tones take the highest allowed bits their present power still carries at
        the present SNR, at exactly the power those bits need. The bits lost go, one step at a
        time, to the tone where the next allowed level costs the least extra power (the
        incremental-energy rule of Levin-Campello loading), while the total stays within the
        budget, each tone within the ceiling, and at most ``swap_max_tones`` tones change.
        """
        levels = self._bit_set
        if levels is None or not math.isfinite(self._budget_lin) or self.swap_max_tones == 0:
            return None, 0, "swap_off", ("bit swaps off (swap_max_tones 0)"
                                         if self.swap_max_tones == 0 else
                                         "no bit swap with this loader")
        loader = self.loader
        n = cur.bits.size
        budget = n * self._budget_lin
        bits = cur.bits.copy()
        power = cur.power.copy()
        idx = np.flatnonzero(low)
        snr_low = snr[idx]
        # Highest allowed level whose need fits both the tone's present power and the ceiling.
        room = np.minimum(power[idx], self._cap_lin)
        new_bits = np.zeros(idx.size, dtype=np.int64)
        for level in levels[1:]:
            need = loader.required_power(np.full(idx.size, level), snr_low)
            new_bits = np.where(need <= room, level, new_bits)
        new_bits = np.minimum(new_bits, bits[idx])
        bits[idx] = new_bits
        power[idx] = loader.required_power(new_bits, snr_low)
        to_regain = int(cur.total_bits - bits.sum())
        changed = np.zeros(n, dtype=bool)
        changed[idx] = True
        # Cost of the next allowed level on every tone that may still take bits.
        pos = np.searchsorted(levels, bits, side="right")
        top = levels.size
        eligible = ~low & (pos < top)
        nxt = levels[np.minimum(pos, top - 1)]
        need_next = loader.required_power(nxt, snr)
        cost = np.where(eligible & (need_next <= self._cap_lin), need_next - power, np.inf)
        total = float(power.sum())
        while to_regain > 0:
            if np.count_nonzero(changed) >= self.swap_max_tones:
                cost = np.where(changed, cost, np.inf)  # only tones already changed may grow
            j = int(np.argmin(cost))
            if not math.isfinite(cost[j]) or total + cost[j] > budget * (1 + 1e-12):
                break
            total += cost[j]
            gained = int(nxt[j] - bits[j])
            bits[j] = nxt[j]
            power[j] = need_next[j]
            changed[j] = True
            to_regain -= gained
            p = int(np.searchsorted(levels, bits[j], side="right"))
            if p >= top:
                cost[j] = np.inf
            else:
                nxt[j] = levels[p]
                need_next[j] = loader.required_power(nxt[j:j + 1], snr[j:j + 1])[0]
                cost[j] = (need_next[j] - power[j] if need_next[j] <= self._cap_lin
                           else np.inf)
        n_changed = int(np.count_nonzero(changed))
        loss = int(cur.total_bits - bits.sum())
        if n_changed > self.swap_max_tones:
            return None, 0, "swap_tones", (f"a bit swap would change {n_changed} tones "
                                           f"(> swap_max_tones {self.swap_max_tones})")
        if loss > self.swap_max_loss_bits or (self._exact_rate and loss != 0):
            return None, 0, "swap_loss", (
                f"a bit swap would lose {loss} bits of the target" if self._exact_rate else
                f"a bit swap would lose {loss} bits (> swap_max_loss_bits "
                f"{self.swap_max_loss_bits})")
        total_power = float(power.sum())
        if total_power > budget * (1 + 1e-9) or (power > self._cap_lin * (1 + 1e-9)).any():
            return None, 0, "swap_power", "a bit swap does not fit the power budget or ceiling"
        need = loader.required_power(bits, snr)
        margin_db = uniform_margin_db(need, budget, self._cap_lin)
        alloc = Allocation(bits=bits, power=power, total_bits=int(bits.sum()),
                           total_power=total_power, margin_db=margin_db)
        return (alloc, int(np.count_nonzero((cur.bits != bits) | (cur.power != power))),
                "tones_low", "")


def _median(x: np.ndarray) -> float:
    """Median of a non-empty 1-D array (np.median without its checks: this runs per frame).

    Sorts ``x`` in place (callers pass a temporary): for a few hundred values a sort costs
    less than a partition around two elements, and gives the same middle values."""
    k = x.size // 2
    x.sort()
    if x.size % 2:
        return float(x[k])
    return 0.5 * float(x[k - 1] + x[k])


def _reload_words(what: str, cur: Allocation, alloc: Allocation) -> str:
    """The reason of a reload made for ``what``, worded by the direction of the change: a
    reload that carries more bits than ``cur`` says so first, so that it never reads as a
    downgrade however it was called for."""
    delta = alloc.total_bits - cur.total_bits
    if delta > 0 and cur.bits.size == alloc.bits.size:
        up = int(np.count_nonzero(alloc.bits > cur.bits))
        down = int(np.count_nonzero(alloc.bits < cur.bits))
        return f"reload: {delta:+d} bits ({_tones(up)} up, {down} down), made for: {what}"
    return f"reload: {what}; {delta:+d} bits"


def _lin(db: np.ndarray) -> np.ndarray:
    return 10.0 ** (db / 10.0)


def _tones(n: int) -> str:
    return f"{n} tone" if n == 1 else f"{n} tones"
