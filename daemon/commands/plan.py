"""``brimline plan SNR_FILE``: a one-shot bit/power plan from a per-tone SNR profile.

The SNR file holds one per-tone SNR in dB per line, in tone order. Blank lines and ``#``
comments (whole-line or trailing) are ignored, and the first non-comment line may be a header
(a line that starts with a letter and is not a number; ``1O.5`` is an error, not a header). A ``.npy`` file holding a 1-D numeric array of SNRs in dB is
read as well. The loading settings come from the ``loading:`` section of a daemon config
(``--config``, the whole file is validated) or its defaults; flags override them.

``--json`` prints one object: the settings used, ``tone_index`` and ``tone_numbering``, then
``bits``, ``power``, ``tone_margin_db``, ``total_bits``, ``total_power`` and
``achieved_margin_db`` of the allocation (0-bit tones carry no power), and in
waterfill mode also ``waterfill_power`` (the continuous water-filling powers, before rounding bits
down), ``water_level`` and ``capacity_bits``. Numbers that are not finite (``achieved_margin_db``
when nothing is loaded, ``water_level`` when no tone can take power, ``cap_db`` when there is no
ceiling) are written as ``null`` so that the output is strict JSON.

Tones are numbered as the daemon numbers them (maps, status, logs, ``brimline watch``): the
signed FFT bins of the link plan's data tones (``link:`` of ``--config``, else the defaults,
-99..99 without pilots and DC). That numbering applies when the file holds one SNR per data
tone of that plan; a file of another length is numbered 0..N-1 in file order, and the output
says so and names the plan's tones (``tone_numbering``: ``"link_plan"`` or ``"file_order"``).

Three margins appear and are kept apart by name. The *target* margin (``--margin-db``, the
config's ``loading.margin_db``) is an input: it is added to the gap before loading. The
*per-tone* margins (``tone_margin_db``) are outputs: how far each loaded tone's planned power is
above the power its bits need at the effective gap, i.e. its margin beyond the target (0 dB
for every loaded tone in rate mode, the same value on every loaded tone in margin mode, spread
out in waterfill mode where bits are rounded down under water-filled powers). The *headroom*
(``achieved_margin_db``, the allocation's ``margin_db``) is how far all required powers could
grow together within the budget and ceilings; margin mode spends it by raising the powers. The
effective gap is spelled out as ``gap_db`` (given, or that of uncoded QAM at ``target_ser``)
``- coding_gain_db + target_margin_db = effective_gap_db``, in the JSON and the text alike.
"""

from __future__ import annotations

import json
import math
import shutil
import sys
from pathlib import Path

import numpy as np

from brimline.daemon.core.loading import allowed_bits, waterfill
from brimline.daemon.core.qam import qam_gap_db
from brimline.daemon.errors import InputError
from brimline.daemon.runtime.config import LinkSection, LoadingSection, load_config
from brimline.drivers.link.frame import make_plan

#: SNRs beyond this magnitude in dB are taken for a unit mistake rather than a measurement.
SNR_DB_LIMIT = 200.0


def configure(parser) -> None:
    """Add the ``plan`` flags to ``parser``."""
    parser.add_argument("snr_file", metavar="SNR_FILE",
                        help="per-tone SNR in dB: a text file, one value per line, or a .npy array")
    parser.add_argument("--config", metavar="FILE",
                        help="daemon config whose 'loading:' section gives the defaults")
    parser.add_argument("--mode", choices=("rate", "margin", "waterfill"),
                        help="rate: most bits; margin: --target-bits with most margin; "
                             "waterfill: continuous water-filling (bits rounded down)")
    gap = parser.add_mutually_exclusive_group()
    gap.add_argument("--gap-db", type=float, metavar="DB",
                     help="SNR gap in dB (instead of --target-ser)")
    gap.add_argument("--target-ser", type=float, metavar="P",
                     help="target symbol error rate; the gap is that of uncoded QAM")
    parser.add_argument("--coding-gain-db", type=float, metavar="DB",
                        help="coding gain subtracted from the gap, dB")
    parser.add_argument("--margin-db", type=float, metavar="DB",
                        help="target noise margin added to the gap, dB")
    parser.add_argument("--bits", metavar="LIST",
                        help="allowed bits per tone: a comma list and/or ranges, e.g. 0,1,2,4,6,8 "
                             "or 0-10")
    parser.add_argument("--budget-db", type=float, metavar="DB",
                        help="total power relative to all tones at nominal power, dB")
    parser.add_argument("--cap-db", type=float, metavar="DB",
                        help="per-tone power ceiling relative to nominal, dB (inf: none)")
    parser.add_argument("--target-bits", type=int, metavar="N",
                        help="bits per OFDM symbol for --mode margin")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


# --------------------------------------------------------------------------- input


def parse_bit_list(text: str) -> list[int]:
    """Parse ``0,1,2,4,6,8`` or ``0-10`` (or a mix) into a list of bits; InputError if bad."""
    out: list[int] = []
    for part in text.split(","):
        part = part.strip()
        lo, dash, hi = part.partition("-")
        try:
            if dash:
                a, b = int(lo), int(hi)
                if b < a:
                    raise ValueError
                out.extend(range(a, b + 1))
            else:
                out.append(int(part))
        except ValueError:
            raise InputError(f"--bits={text!r}: {part!r} is not a bit count or range a-b") from None
    return list(allowed_bits(out, key="--bits", shown=repr(text), error=InputError))


def read_snr_db(path: str | Path) -> np.ndarray:
    """Read per-tone SNRs in dB from a text or ``.npy`` file (see the module docstring).

    Raises
    ------
    InputError
        Missing file, a directory, unreadable or empty content, a value that is not a number,
        not finite or beyond +-200 dB; the message names the file and the line.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such file")
    if p.is_dir():
        raise InputError(f"{p}: is a directory, not an SNR file")
    if p.suffix.lower() == ".npy":
        return _read_npy(p)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{p}: not a text file (expected one SNR in dB per line, or .npy)") \
            from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror}") from exc
    values: list[float] = []
    seen_content = False
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        try:
            value = float(line)
        except ValueError:
            if not seen_content and line[0].isalpha():  # the optional header line
                seen_content = True
                continue
            raise InputError(f"{p} line {number}: {line!r} is not an SNR in dB") from None
        seen_content = True
        _check_snr_db(value, f"{p} line {number}")
        values.append(value)
    if not values:
        raise InputError(f"{p}: no SNR values (expected one SNR in dB per line)")
    return np.array(values, dtype=np.float64)


def _check_snr_db(value: float, where: str) -> None:
    if not math.isfinite(value):
        raise InputError(f"{where}: SNR {value!r} dB must be finite")
    if abs(value) > SNR_DB_LIMIT:
        raise InputError(f"{where}: SNR {value!r} dB is beyond +-{SNR_DB_LIMIT:g} dB")


def _read_npy(p: Path) -> np.ndarray:
    try:
        arr = np.load(p, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise InputError(f"{p}: not a readable .npy array ({exc})") from None
    if not isinstance(arr, np.ndarray) or arr.ndim != 1 or arr.size == 0 \
            or not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise InputError(f"{p}: expected a non-empty 1-D numeric array of SNRs in dB, got "
                         f"shape {getattr(arr, 'shape', '?')} dtype {getattr(arr, 'dtype', '?')}")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr) | (np.abs(arr) > SNR_DB_LIMIT)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        _check_snr_db(float(arr[i]), f"{p} element {i}")
    return arr


def _section(args, base: LoadingSection) -> LoadingSection:
    """The loading settings: the config's section (or defaults) with the flags on top."""
    data = base.model_dump()
    flags = {
        "mode": args.mode, "coding_gain_db": args.coding_gain_db, "margin_db": args.margin_db,
        "budget_db": args.budget_db, "cap_db": args.cap_db, "target_bits": args.target_bits,
    }
    for key, value in flags.items():
        if value is not None:
            data[key] = value
    if args.gap_db is not None:
        data["gap_db"] = args.gap_db
    if args.target_ser is not None:
        data["gap_db"] = None
        data["target_ser"] = args.target_ser
    if args.bits is not None:
        data["bits"] = parse_bit_list(args.bits)
    for key in ("gap_db", "coding_gain_db", "margin_db", "budget_db"):
        if data[key] is not None and not math.isfinite(data[key]):
            raise InputError(f"--{key.replace('_', '-')}={data[key]} must be finite")
    if data["mode"] == "margin" and data["target_bits"] is None:
        raise InputError("--mode margin needs --target-bits")
    try:
        return LoadingSection.model_validate(data)
    except ValueError as exc:  # pydantic's ValidationError is a ValueError
        first = exc.errors()[0] if hasattr(exc, "errors") else {"loc": (), "msg": str(exc)}
        key = ".".join(str(x) for x in first["loc"]) or "loading"
        msg = first["msg"].removeprefix("Value error, ")
        raise InputError(f"--{key.replace('_', '-')}: {msg}") from None


# --------------------------------------------------------------------------- output


def _finite_or_none(x: float):
    return float(x) if math.isfinite(x) else None


def gap_terms(section: LoadingSection) -> dict:
    """How the loader's gap is made: the JSON keys of ``plan --json``.

    Returns
    -------
    dict
        ``gap_db`` (given, or uncoded QAM at ``target_ser``), ``target_ser`` (``None`` when the
        gap was given), ``coding_gain_db``, ``target_margin_db`` and ``effective_gap_db``
        ``= gap_db - coding_gain_db + target_margin_db``, the gap the loader uses.
    """
    base_db = section.gap_db if section.gap_db is not None else qam_gap_db(section.target_ser)
    return {
        "gap_db": base_db,
        "target_ser": None if section.gap_db is not None else section.target_ser,
        "coding_gain_db": section.coding_gain_db,
        "target_margin_db": section.margin_db,
        "effective_gap_db": section.effective_gap_db(),
    }


def _gap_text(terms: dict) -> str:
    base = f"{terms['gap_db']:.2f} dB" + ("" if terms["target_ser"] is None
                                           else f" (uncoded QAM at SER {terms['target_ser']:g})")
    return (f"{terms['effective_gap_db']:.2f} dB = gap {base} - coding gain "
            f"{terms['coding_gain_db']:g} dB + target margin {terms['target_margin_db']:g} dB")


def tone_numbers(n_values: int, link: LinkSection) -> tuple[np.ndarray, str]:
    """Tone numbers for ``n_values`` SNRs in file order.

    Returns
    -------
    tone_index : ndarray of int
        The link plan's data tones (signed FFT bins, the daemon's numbering) when there is one
        value per data tone, else ``0 .. n_values - 1``.
    numbering : {"link_plan", "file_order"}
    """
    data_tones = make_plan(**link.model_dump()).data_tones
    if data_tones.size == n_values:
        return data_tones.astype(np.int64), "link_plan"
    return np.arange(n_values, dtype=np.int64), "file_order"


def tone_margins_db(bits: np.ndarray, power: np.ndarray, snr: np.ndarray,
                    gap_db: float) -> np.ndarray:
    """Per-tone margin beyond the target, dB: ``10 log10(power * snr / (gap (2^b - 1)))``
    on loaded tones (``gap`` the effective gap, linear), NaN on idle ones."""
    b = np.asarray(bits, dtype=np.float64)
    need = 10.0 ** (gap_db / 10.0) * (np.exp2(b) - 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = 10.0 * np.log10(np.asarray(power, dtype=np.float64) * snr / need)
    return np.where(b > 0, out, np.nan)


def _bits_text(bits: list[int]) -> str:
    if bits == list(range(bits[-1] + 1)):
        return f"0-{bits[-1]}"
    return ",".join(str(b) for b in bits)


def _glyphs() -> tuple[str, str, str]:
    """Full block, half block, idle mark; ASCII when stdout cannot encode blocks."""
    encoding = getattr(sys.stdout, "encoding", None) or "ascii"
    try:
        "\u2588\u2584\u00b7".encode(encoding)
    except (UnicodeEncodeError, LookupError):
        return "#", ".", "_"
    return "\u2588", "\u2584", "\u00b7"


def _columns(n: int, width: int) -> tuple[np.ndarray, int]:
    """Start indices of the chart's columns (whole tones per column) and tones per column."""
    per = -(-n // max(1, width))
    return np.arange(0, n, per), per


def _column_means(values: np.ndarray, starts: np.ndarray) -> np.ndarray:
    sizes = np.diff(np.append(starts, values.size))
    return np.add.reduceat(values.astype(np.float64), starts) / sizes


def snr_strip(snr_db: np.ndarray, *, width: int = 64) -> str:
    """One row of text: each column's mean SNR as a bar height between the profile's extremes."""
    starts, _ = _columns(snr_db.size, width)
    mean = _column_means(snr_db, starts)
    full, _, _ = _glyphs()
    ramp = " \u2581\u2582\u2583\u2584\u2585\u2586\u2587\u2588" if full != "#" \
        else " .:-=+*#%@"
    lo, hi = float(mean.min()), float(mean.max())
    level = np.zeros(mean.size, dtype=int) if hi <= lo else \
        np.rint((mean - lo) / (hi - lo) * (len(ramp) - 1)).astype(int)
    return "".join(ramp[k] for k in level)


def bit_chart(bits: np.ndarray, *, width: int = 64, tone_index: np.ndarray | None = None,
              numbering: str = "file_order") -> list[str]:
    """Bits per tone across the band as rows of text, one column per group of tones.

    Each column is the mean bits of its group of adjacent tones (the same whole number of tones
    per column, stated under the chart); a full block per whole bit and a half block for a
    remaining half. Columns whose tones all carry 0 bits show an idle mark. The last row names
    the first and last tone in ``tone_index`` (default ``0 .. N-1``) and their ``numbering``.
    """
    full, half, idle = _glyphs()
    n = bits.size
    starts, per = _columns(n, width)
    mean = _column_means(bits, starts)
    top = max(int(np.ceil(mean.max())), 1)
    rows = []
    for level in range(top, 0, -1):
        cells = np.where(mean >= level, full, np.where(mean >= level - 0.5, half, " "))
        label = f"{level:3d} " if (level == top or level % 2 == 0) else "    "
        rows.append(f"{label}|{''.join(cells)}|")
    base = np.where(mean == 0, idle, "-")
    rows.append(f"    +{''.join(base)}+")
    tones = np.arange(n) if tone_index is None else np.asarray(tone_index)
    what = ("data tones of the link plan" if numbering == "link_plan"
            else "file positions, not the link plan's tones")
    span = (f"tone {int(tones[0])} .. {int(tones[-1])} ({what}; "
            f"{per} tone{'s' if per > 1 else ''} per column)")
    rows.append(f"     {span}")
    return rows


def summary_lines(snr_db: np.ndarray, section: LoadingSection, alloc, wf, *,
                  tone_index: np.ndarray, numbering: str, plan_tones: np.ndarray,
                  source: str) -> list[str]:
    """The text summary of a plan (pure: every number comes from the arguments).

    Parameters
    ----------
    snr_db : ndarray
        Per-tone SNR in dB, file order.
    section : LoadingSection
        The loading settings used.
    alloc : Allocation
        The plan.
    wf : WaterfillResult or None
        The continuous water-filling (waterfill mode).
    tone_index, numbering : ndarray, str
        From :func:`tone_numbers`.
    plan_tones : ndarray
        The link plan's data tones (named when the file is numbered in file order).
    source : str
        The SNR file's name.

    Returns
    -------
    list of str
    """
    terms = gap_terms(section)
    snr = 10.0 ** (snr_db / 10.0)
    budget = snr.size * 10.0 ** (section.budget_db / 10.0)
    loaded = int(np.count_nonzero(alloc.bits))
    idle = snr.size - loaded
    cap_text = "none" if not math.isfinite(section.cap_db) else f"{section.cap_db:g} dB per tone"
    if numbering == "link_plan":
        tones_text = (f"{snr.size} data tones {int(tone_index[0])}..{int(tone_index[-1])} "
                      f"(the link plan's numbering, as in maps and logs)")
    else:
        tones_text = (f"{snr.size}, numbered 0..{snr.size - 1} in file order (the link plan "
                      f"has {plan_tones.size} data tones {int(plan_tones[0])}.."
                      f"{int(plan_tones[-1])}, so these are not its tone numbers)")
    lines = [
        f"plan for {source}",
        f"  tones      {tones_text}",
        f"  SNR        {snr_db.min():.1f} to {snr_db.max():.1f} dB "
        f"(median {np.median(snr_db):.1f} dB)",
        f"  mode       {section.mode}"
        + (f", target {section.target_bits} bits" if section.mode == "margin" else ""),
        f"  gap        {_gap_text(terms)}",
        f"  bits       {_bits_text(list(section.bits))} per tone",
        f"  power      budget {section.budget_db:g} dB ({budget:.4g} x nominal tone power), "
        f"ceiling {cap_text}",
        "",
        f"  carries    {alloc.total_bits} bits per symbol on {loaded} tones ({idle} idle), "
        f"mean {alloc.total_bits / snr.size:.2f} bits per tone",
        f"  uses       {alloc.total_power:.4g} of {budget:.4g} x nominal "
        f"({10 * math.log10(max(alloc.total_power, 1e-300) / budget):+.2f} dB of the budget)"
        if alloc.total_power > 0 else "  uses       no power",
    ]
    if loaded:
        tm = tone_margins_db(alloc.bits, alloc.power, snr, terms["effective_gap_db"])
        tm = tm[np.isfinite(tm)]
        lo, med, hi = float(tm.min()), float(np.median(tm)), float(tm.max())
        if round(lo, 2) == round(hi, 2):
            lines.append(f"  margins    {lo:.2f} dB beyond the target on each of the {loaded} "
                         "loaded tones")
        else:
            lines.append(f"  margins    beyond the target, per loaded tone: {lo:.2f} to "
                         f"{hi:.2f} dB (median {med:.2f} dB)")
    if math.isfinite(alloc.margin_db):
        lines.append(f"  headroom   the required powers could all grow {alloc.margin_db:.2f} dB "
                     "within budget and ceilings"
                     + ("; margin mode spent it on the powers" if section.mode == "margin"
                        else ""))
    else:
        lines.append("  headroom   unlimited (nothing loaded)")
    if wf is not None:
        lines.append(f"  waterfill  level {wf.water_level:.4g}, capacity {wf.capacity_bits:.1f} "
                     "bits per symbol at this gap (bits above are rounded down)")
    return lines


def run(args) -> int:
    """Read the SNR file, plan, print a summary and chart (or JSON). Returns 0."""
    config = load_config(args.config) if args.config else None
    section = _section(args, config.loading if config is not None else LoadingSection())
    link = config.link if config is not None else LinkSection()
    snr_db = read_snr_db(args.snr_file)
    tone_index, numbering = tone_numbers(snr_db.size, link)
    plan_tones = make_plan(**link.model_dump()).data_tones
    terms = gap_terms(section)
    gap_db = terms["effective_gap_db"]
    loader = section.loader()
    snr = 10.0 ** (snr_db / 10.0)
    alloc = loader(snr)
    wf = None
    if section.mode == "waterfill":
        wf = waterfill(snr, gap_db=gap_db, budget_db=section.budget_db, cap_db=section.cap_db)
    if args.json:
        tm = tone_margins_db(alloc.bits, alloc.power, snr, gap_db)
        out = {
            "file": str(args.snr_file),
            "mode": section.mode,
            "n_tones": int(snr.size),
            "tone_numbering": numbering,
            "tone_index": tone_index.tolist(),
            **terms,
            "allowed_bits": list(section.bits),
            "budget_db": section.budget_db,
            "cap_db": _finite_or_none(section.cap_db),
            "target_bits": section.target_bits,
            "bits": alloc.bits.tolist(),
            "power": alloc.power.tolist(),
            "tone_margin_db": [None if not math.isfinite(v) else float(v) for v in tm],
            "total_bits": alloc.total_bits,
            "total_power": alloc.total_power,
            "achieved_margin_db": _finite_or_none(alloc.margin_db),
        }
        if wf is not None:
            out["waterfill_power"] = wf.power.tolist()
            out["water_level"] = _finite_or_none(wf.water_level)
            out["capacity_bits"] = wf.capacity_bits
        print(json.dumps(out, allow_nan=False))
        return 0
    lines = summary_lines(snr_db, section, alloc, wf, tone_index=tone_index,
                          numbering=numbering, plan_tones=plan_tones, source=str(args.snr_file))
    lines.append("")
    lines.append("  bits per tone")
    width = max(16, min(96, shutil.get_terminal_size((80, 24)).columns - 8))
    chart = bit_chart(alloc.bits, width=width, tone_index=tone_index, numbering=numbering)
    lines.extend("  " + row for row in chart[:-1])
    lines.append(f"  snr |{snr_strip(snr_db, width=width)}|  {snr_db.min():.0f} to "
                 f"{snr_db.max():.0f} dB")
    lines.append("  " + chart[-1])
    lines.append("")
    lines.append("  A plan only; nothing is transmitted. Before going on air read the RF cautions "
                 "(brimline plan --help).")
    print("\n".join(lines))
    return 0
