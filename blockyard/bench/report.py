"""The benchmark's figures as text: machine, peaks, per-config table, ratios, scan, profile, quality, targets."""

from __future__ import annotations

from typing import Any


def format_report(result: dict[str, Any]) -> str:
    """The benchmark as text; each section appears only where ``result`` holds its figures."""
    sections = (_machine_lines, _config_lines, _ratio_lines, _scan_lines, _profile_lines, _quality_lines,
                _target_lines)
    return "\n".join(line for section in sections for line in section(result))


def _pct(x: float) -> str:
    return f"{100 * x:.0f}%"


def _machine_lines(result: dict[str, Any]) -> list[str]:
    lines = []
    m = result.get("machine", {})
    if m:
        lines.append(f"machine: {m['cpu']}, {m['threads']} threads, torch {m['torch']} ({m['capability']}), "
                     f"bf16 {'native' if m['bf16'] else 'no'}; load average {m['load_average'][0]:.2f}")
    if "peaks" in result:
        p = result["peaks"]
        bf16_peak = f"{p['gemm_bf16_gflops']:.0f} GFLOP/s" if "gemm_bf16_gflops" in p else "not measured"
        lines.append(f"peaks: fp32 GEMM {p['gemm_fp32_gflops']:.0f} GFLOP/s, bf16 GEMM {bf16_peak}, "
                     f"copy {p['copy_gbytes_per_s']:.1f} GB/s")
    if result.get("skipped", {}).get("cases"):
        lines.append(f"skipped: {', '.join(result['skipped']['cases'])} ({result['skipped']['reason']})")
    return lines


def _config_lines(result: dict[str, Any]) -> list[str]:
    if "configs" not in result:
        return []
    lines = ["", f"{'config':<24} {'loop':<8} {'seq':>5} {'batch':>5} {'tokens/s':>9} {'GFLOP/s':>8} {'MFU':>5}"]
    for row in result["configs"]:
        lines.append(f"{row['name']:<24} {row['loop']:<8} {row['seq_len']:>5} {row['batch']:>5} "
                     f"{row['tokens_per_s']:>9.0f} {row['gflops']:>8.1f} {_pct(row['mfu']):>5}")
    lines.append("(MFU: training FLOPs per token (6N + attention/scan terms + head) x tokens/s / GEMM peak "
                 "of the same precision)")
    return lines


def _ratio_lines(result: dict[str, Any]) -> list[str]:
    if "ratios" not in result:
        return []
    lines = ["", f"{'ratio':<36} {'best/best':>9} {'median of rounds':>17} {'at equal MFU':>13} "
             f"{'paired steps [95%]':>22}"]
    medians = result.get("ratios_median_of_rounds", {})
    ceilings = result.get("ratios_at_equal_mfu", {})
    paired = result.get("ratios_paired", {})
    for key, value in result["ratios"].items():
        med, eq = medians.get(key), ceilings.get(key)
        lines.append(f"{key:<36} {'n/a' if value is None else f'{value:.2f}x':>9} "
                     f"{'n/a' if med is None else f'{med:.2f}x':>17} {'n/a' if eq is None else f'{eq:.2f}x':>13} "
                     f"{_paired_cell(paired.get(key)):>22}")
    if ceilings:
        lines.append("(at equal MFU: the ratio of GEMM peak / FLOPs per token of the two configs, what the "
                     "ratio would be if both used their peak equally well)")
    if paired:
        lines.append("(paired steps: the steps of the two configs alternated in this process; median over pairs "
                     "and its distribution-free 95% interval; against the plain loop, times the trainer loop's own "
                     "efficiency; the targets read this figure)")
    return lines


def _paired_cell(p: dict[str, Any] | None) -> str:
    if p is None:
        return "n/a"
    if p["low"] is None or p["high"] is None:
        return f"{p['median']:.2f}x"
    return f"{p['median']:.2f}x [{p['low']:.2f}, {p['high']:.2f}]"


def _scan_lines(result: dict[str, Any]) -> list[str]:
    scan = result.get("scan")
    if not scan:
        return []
    if "backends" not in scan:
        return [f"scan: {scan.get('error')}"]
    lines = ["", f"scan {tuple(scan['shape'])} fp32: multiply-add floor fwd+bwd {scan['floor_fwd_bwd_ms']:.2f} ms; "
                 f"auto backend = {scan['auto']}"]
    copy = result.get("peaks", {}).get("copy_gbytes_per_s")
    for name, s in scan["backends"].items():
        bw = f" ({_pct(s['fwd_gbytes_per_s'] / copy)} of copy)" if copy else ""
        lines.append(f"  {name:<9} fwd {s['fwd_ms']:.2f} ms, fwd+bwd {s['fwd_bwd_ms']:.2f} ms = "
                     f"{s['ratio_to_floor']:.2f}x floor; fwd {s['fwd_gbytes_per_s']:.1f} GB/s{bw}")
    return lines


def _profile_lines(result: dict[str, Any]) -> list[str]:
    lines = []
    for name, prof in result.get("profile", {}).items():
        lines += ["", f"profile of one step, {name} ({prof['wall_ms']:.0f} ms wall):"]
        for bucket, ms in sorted(prof["ms"].items(), key=lambda kv: -kv[1]):
            lines.append(f"  {bucket:<26} {ms:>8.1f} ms {_pct(prof['share'][bucket]):>5}")
    return lines


def _quality_lines(result: dict[str, Any]) -> list[str]:
    q = result.get("quality")
    if not q:
        return []
    bf16 = q.get("bf16", "bf16")
    lr = f", peak lr {q['lr']:g}" if "lr" in q else ""
    lines = ["", f"bf16 quality after {q['steps']} steps{lr} (final val loss, same seed and batches):"]
    if bf16 != "bf16":
        lines.append(f"  bf16 side run as {bf16}: no bf16 units here ({q.get('bf16_reason')})")
    for row in q["seeds"]:
        lines.append(f"  seed {row['seed']}: fp32 {row['fp32']['final_val_loss']:.4f}, "
                     f"{bf16} {row['bf16']['final_val_loss']:.4f} ({100 * row['relative_difference']:+.2f}%)")
    ci = q.get("ci95")
    ci_text = f", 95% interval {100 * ci[0]:+.2f}% to {100 * ci[1]:+.2f}%" if ci else ""
    lines.append(f"  mean bf16 - fp32: {100 * q['mean_relative_difference']:+.2f}%{ci_text}")
    return lines


def _target_lines(result: dict[str, Any]) -> list[str]:
    targets = result.get("targets", []) + result.get("quality", {}).get("targets", [])
    if not targets:
        return []
    lines = ["", "targets:"]
    for t in targets:
        mark = {True: "met   ", False: "MISSED", None: "n/a   " if t["value"] is None else "unsure"}[t["met"]]
        value = "n/a" if t["value"] is None else f"{t['value']:.3g}"
        note = f"; {t['note']}" if t.get("note") else ""
        lines.append(f"  [{mark}] {t['name']}: {value} (target {t['op']} {t['bound']:g}){note}")
    return lines
