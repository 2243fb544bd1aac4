from pathlib import Path as _Path
OUT = _Path(__file__).resolve().parent / "out"   # cached drops and results (not in git)
OUT.mkdir(exist_ok=True)
# How many patch passes would the best adaptive strategies need for median all-pixel Spearman >= 0.9?
import numpy as np
from scipy.stats import spearmanr
import simulate as s
tiling = (s.ii % 2 == 0) & (s.jj % 2 == 0)
for B in [55, 80, 112, 140, 170]:
    s.BUDGET = B
    for cname, cm in [("tiling-quincunx(32)", s.COARSE["tiling-quincunx (32)"]), ("tiling(64)", tiling)]:
        if cm.sum() >= B: continue
        for crit in ["grad", "abs"]:
            line = []
            for key, D in s.DROPS.items():
                sp, io = [], []
                for n in range(s.N):
                    mask, pred = s.adaptive(D[n], cm, 3, crit, s.interp_linear)
                    he, ha = s.heat(D[n]), s.heat(pred)
                    sp.append(spearmanr(he.ravel(), ha.ravel())[0]); io.append(s.iou(s.top_box(he), s.top_box(ha)))
                sp = np.nan_to_num(sp); io = np.array(io)
                line.append(f"{key} sp {np.median(sp):.3f} ({(sp>=.9).mean():.2f}) iou {np.median(io):.2f} ({(io>=.8).mean():.2f})")
            print(f"patches {B:3d} {cname:20s} {crit:5s} " + " | ".join(line), flush=True)
