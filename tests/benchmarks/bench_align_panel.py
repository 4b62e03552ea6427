"""Alignment on the panel of encoders: encoder x objective -> held-out figures, one table.

    python tests/benchmarks/bench_align_panel.py [--encoders workbench,sequential,...]
        [--objectives combined,dann,paired,teacher] [--seeds 0,1,2] [--steps N] [--pairs N]
        [--whole]

For each panel encoder (tests/alignment_panel.py: trained here on clean images only) and
each objective, the default alignment runs once per split seed and the table shows the
mean and range over seeds of: the held-out cluttered-probe gap closed (mean over the tasks
the encoder carries), the worst relative change of a carried clean probe, the held-out
domain accuracy after, the relative drift's fall, and seconds of training. Figures are of
the state kept: when the alignment did not improve the encoder the original is kept and
counts as 0% closed. Seconds depend on the machine and its load; steps do not. With
``--whole`` every encoder is trained from its first top-level stage with parameters (the
whole network where its forward is a chain) instead of the default trainable part.

Acceptance targets (issue "Alignment that works on encoders it was never tuned on"): gap
closed >= 50% (digits >= 60%, ahead of the 52.9% of Ganin et al., JMLR 17 (2016), Table 2),
carried clean probes within 5%, drift falls >= 30%.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import alignment_panel as panel_module  # noqa: E402


def _fmt(values, pct=True):
    values = [v for v in values if v == v]
    if not values:
        return "n/a"
    k = 100.0 if pct else 1.0
    mean, low, high = np.mean(values) * k, min(values) * k, max(values) * k
    return f"{mean:6.1f} [{low:.1f}, {high:.1f}]" if pct else f"{mean:.3f} [{low:.3f}, {high:.3f}]"


def main(argv=None) -> int:
    import torch

    from invariance import SAFETY_CAUTION
    from invariance.align import align_encoder
    from invariance.options import AlignmentOptions, ScoringOptions

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--encoders", default=",".join(panel_module.PANEL))
    parser.add_argument("--objectives", default="combined,dann,paired,teacher")
    parser.add_argument("--seeds", default="0,1,2")
    parser.add_argument("--steps", type=int, default=None, help="default: AlignmentOptions().steps")
    parser.add_argument("--pairs", type=int, default=600, help="scene pairs")
    parser.add_argument("--digits", type=int, default=797, help="digit pairs (at most 797)")
    parser.add_argument("--whole", action="store_true", help="train from the first stage with parameters")
    parser.add_argument("--json", default=None, help="also write every run's figures to this file")
    args = parser.parse_args(argv)
    torch.set_num_threads(min(2, torch.get_num_threads()))
    names = tuple(args.encoders.split(","))
    root = Path(tempfile.mkdtemp(prefix="align_panel_"))
    start = time.perf_counter()
    panel = panel_module.build_panel(root, names=names, scene_count=args.pairs, digit_count=args.digits)
    print(f"panel built in {time.perf_counter() - start:.0f} s (encoders trained on clean images only)")
    fixed = {} if args.steps is None else {"steps": args.steps}
    raw = []
    print(f"{'encoder':<11} {'objective':<9} {'gap closed %':<20} {'clean change %':<20} {'domain acc after':<22} "
          f"{'drift fall %':<20} {'seconds':<8} improved")
    for name in names:
        encoder, pairs = panel[name]
        if args.whole:
            fixed["train_from"] = next(n for n, child in encoder.module.named_children()
                                       if any(True for _ in child.parameters()))
        for objective in args.objectives.split(","):
            rows = []
            for seed in (int(s) for s in args.seeds.split(",")):
                result = align_encoder(pairs, encoder, out=root / f"{name}_{objective}_{seed}.pt",
                                       options=AlignmentOptions(objective=objective, **fixed),
                                       scoring=ScoringOptions(seed=seed, permutations=100), progress=False)
                rows.append(panel_module.summary(result))
                if args.json:
                    raw.append({"encoder": name, "objective": objective, "seed": seed, "summary": rows[-1],
                                "before": result["before"]["probe"], "after": result["after"]["probe"],
                                "drift": [{k: side.get("paired_drift", {}).get(k)
                                           for k in ("relative_drift", "relative_drift_ci")}
                                          for side in (result["before"], result["after"])],
                                "drift_change": result["drift_change"],
                                "improved": result["improved"], "outcome": result["outcome"],
                                "stopped_because": result["stopped_because"], "train_from": result["train_from"]})
                    Path(args.json).write_text(json.dumps(raw, indent=1, default=float))
            print(f"{name:<11} {objective:<9} {_fmt([r['gap_closed'] for r in rows]):<20} "
                  f"{_fmt([r['worst_clean_change'] for r in rows]):<20} "
                  f"{_fmt([r['domain_accuracy'][1] for r in rows], pct=False):<22} "
                  f"{_fmt([r['drift_fall'] for r in rows]):<20} {np.mean([r['seconds'] for r in rows]):<8.1f} "
                  f"{sum(r['improved'] for r in rows)}/{len(rows)}  tasks {rows[0]['tasks']}"
                  f"{'; not decodable, left out: ' + str(rows[0]['left_out']) if rows[0]['left_out'] else ''}",
                  flush=True)
    print(f"total {time.perf_counter() - start:.0f} s; seconds depend on this machine's load")
    print(SAFETY_CAUTION)
    return 0


if __name__ == "__main__":
    sys.exit(main())
