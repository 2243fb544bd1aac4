from pathlib import Path as _Path
OUT = _Path(__file__).resolve().parent / "out"   # cached drops and results (not in git)
OUT.mkdir(exist_ok=True)
import numpy as np, sys, json
from scipy.stats import spearmanr
from scipy.interpolate import griddata, RegularGridInterpolator, RBFInterpolator
from scipy.spatial import cKDTree
from scipy import ndimage

d = np.load(str(OUT / "drops.npz"))
P, L, boxes = d["probs"], d["logits"], d["boxes"]
N = len(P); G = 15; BUDGET = 55
T = P[:, 0].argmax(1); idx = np.arange(N)
DROPS = {"prob": P[idx, 0, T][:, None] - P[idx, 1:, T],
         "logit": L[idx, 0, T][:, None] - L[idx, 1:, T]}
SAT = P[idx, 0, T] > 0.999

# heatmap operator: pixel = mean of covering patch drops
A = np.zeros((4096, 225))
for k, (r0, r1, c0, c1) in enumerate(boxes):
    m = np.zeros((64, 64)); m[r0:r1, c0:c1] = 1; A[:, k] = m.ravel()
A /= A.sum(1, keepdims=True)
heat = lambda drops: (A @ drops).reshape(64, 64)
ii, jj = np.divmod(np.arange(225), G)
XY = np.stack([ii, jj], 1).astype(float)

def top_box(v, share=0.05):
    k = int(round(share * v.size)); o = np.argsort(-v.ravel(), kind="stable")[:k]
    r, c = np.divmod(o, 64); return (r.min(), r.max() + 1, c.min(), c.max() + 1)
def blob_box(v, share=0.05):   # the tool's peak_box: largest blob of top-5% positive pixels
    k = int(round(share * v.size)); o = np.argsort(-v.ravel(), kind="stable")[:k]
    m = np.zeros(v.size, bool); m[o] = True; m = m.reshape(v.shape) & (v > 0)
    if not m.any(): return None
    lab, n = ndimage.label(m)
    if n > 1:
        s = ndimage.sum_labels(m, lab, index=np.arange(1, n + 1)); m = lab == int(np.argmax(s)) + 1
    r = np.flatnonzero(m.any(1)); c = np.flatnonzero(m.any(0)); return (r[0], r[-1] + 1, c[0], c[-1] + 1)
def iou(a, b):
    if a is None or b is None: return float(a is None and b is None)
    h = max(0, min(a[1], b[1]) - max(a[0], b[0])); w = max(0, min(a[3], b[3]) - max(a[2], b[2]))
    inter = h * w; ua = (a[1]-a[0])*(a[3]-a[2]) + (b[1]-b[0])*(b[3]-b[2]) - inter
    return inter / ua

# ---------- interpolators on the 15x15 grid ----------
def interp_linear(mask, vals):
    pts = XY[mask]; out = griddata(pts, vals, XY, method="linear")
    bad = np.isnan(out)
    if bad.any(): out[bad] = griddata(pts, vals, XY[bad], method="nearest")
    out[mask] = vals; return out
def interp_cubic(mask, vals):
    pts = XY[mask]; out = griddata(pts, vals, XY, method="cubic")
    bad = np.isnan(out)
    if bad.any(): out[bad] = interp_linear(mask, vals)[bad]
    out[mask] = vals; return out
def interp_tps(mask, vals):
    out = RBFInterpolator(XY[mask], vals, kernel="thin_plate_spline", smoothing=0.0)(XY)
    out[mask] = vals; return out
def interp_rgi(rows, cols):
    def f(mask, vals):
        grid = np.full((G, G), np.nan); grid[ii[mask], jj[mask]] = vals
        sub = grid[np.ix_(rows, cols)]; assert not np.isnan(sub).any()
        out = RegularGridInterpolator((rows, cols), sub, method="linear", bounds_error=False, fill_value=None)(XY)
        out[mask] = vals; return out
    return f
INTERP = {"linear": interp_linear, "cubic": interp_cubic, "tps": interp_tps}

def lattice(rows, cols):
    m = np.zeros((G, G), bool); m[np.ix_(rows, cols)] = True; return m.ravel()

# ---------- fixed lattices ----------
R8 = list(range(0, 15, 2)); C6 = [0, 3, 6, 9, 12, 14]; S7 = [0, 2, 5, 7, 9, 12, 14]
LAT = {
    "8x6 product (rows 0,2..14; cols 0,3,6,9,12,14)": (lattice(R8, C6), (R8, C6)),
    "7x7 product (0,2,5,7,9,12,14)^2": (lattice(S7, S7), (S7, S7)),
    "11x5 product (rows 0,1,3,4,...; cols 0,3,7,11,14)": None,   # filled below
}
R11 = [0, 1, 3, 4, 6, 7, 8, 10, 11, 13, 14]; C5 = [0, 3, 7, 11, 14]
LAT["11x5 product (rows 0,1,3,4,...; cols 0,3,7,11,14)"] = (lattice(R11, C5), (R11, C5))
q = ((ii + jj) % 4 == 0) & ~((ii == 14) & (jj == 14)); LAT["quincunx (i+j)%4==0 minus (14,14) (55)"] = (q, None)
q2 = ((ii + jj) % 4 == 1) & ~((ii == 14) & (jj == 11)); LAT["quincunx (i+j)%4==1 minus (14,11) (55)"] = (q2, None)
tq = (ii % 2 == 0) & (jj % 2 == 0) & ((ii + jj) % 4 == 0)    # checkerboard of the 8x8 stride-8 tiling
for name, (m, _) in LAT.items(): assert m.sum() <= BUDGET, (name, m.sum())

# coarse lattices for adaptive strategies
C30 = lattice([0, 3, 6, 9, 12, 14], [0, 4, 7, 10, 14])           # 6x5 = 30
COARSE = {"6x5 (30)": C30, "tiling-quincunx (32)": tq,
          "5x5 (25) 0,4,7,10,14": lattice([0, 4, 7, 10, 14], [0, 4, 7, 10, 14]),
          "4x4 (16) 0,5,9,14": lattice([0, 5, 9, 14], [0, 5, 9, 14]),
          "3x3 (9) 0,7,14": lattice([0, 7, 14], [0, 7, 14])}

def neighbourhood_range(mask, vals, k=6):
    tree = cKDTree(XY[mask]); dist, nn = tree.query(XY, k=min(k, mask.sum()))
    v = vals[nn]; return v.max(1) - v.min(1), dist[:, 0]

def adaptive(true, coarse, rounds, crit, interp):
    mask = coarse.copy(); left = BUDGET - mask.sum()
    per = [left // rounds + (1 if r < left % rounds else 0) for r in range(rounds)]
    for n in per:
        pred = interp(mask, true[mask])
        if crit == "abs":
            score = np.abs(pred)
        elif crit == "grad":
            g = np.hypot(*np.gradient(pred.reshape(G, G))).ravel()
            _, dist = neighbourhood_range(mask, true[mask]); score = g * dist
        elif crit == "range":
            rng, dist = neighbourhood_range(mask, true[mask]); score = rng * dist
        elif crit == "abs+range":
            rng, dist = neighbourhood_range(mask, true[mask]); score = np.abs(pred) + rng * dist
        elif crit == "absdil":  # |pred| max-filtered over the 3x3 neighbourhood: grow around hot spots
            score = ndimage.maximum_filter(np.abs(pred).reshape(G, G), size=3).ravel() + 1e-9 * np.abs(pred)
        score = np.where(mask, -np.inf, score)
        pick = np.argsort(-score, kind="stable")[:n]; mask[pick] = True
    return mask, interp(mask, true[mask])

def oracle(true, interp):
    mask = np.zeros(225, bool); mask[np.argsort(-np.abs(true), kind="stable")[:BUDGET]] = True
    return mask, interp(mask, true[mask])

def evaluate(fn):
    res = {}
    for key, D in DROPS.items():
        sp, io, iob, sp5, npass = [], [], [], [], []
        for n in range(N):
            true = D[n]; mask, pred = fn(true)
            assert np.allclose(pred[mask], true[mask])
            he, ha = heat(true), heat(pred)
            sp.append(spearmanr(he.ravel(), ha.ravel())[0])
            sel = (np.abs(he) >= 0.05 * he.max()) | (np.abs(ha) >= 0.05 * he.max())   # brief's "either map >= 5% of peak"
            sel = (he >= 0.05 * he.max()) | (ha >= 0.05 * he.max())
            sp5.append(spearmanr(he[sel], ha[sel])[0] if sel.sum() > 2 else np.nan)
            io.append(iou(top_box(he), top_box(ha))); iob.append(iou(blob_box(he), blob_box(ha)))
            npass.append(mask.sum() + 1)
        sp, io, iob, sp5 = map(lambda a: np.nan_to_num(np.array(a, float), nan=0.0), (sp, io, iob, sp5))
        res[key] = dict(sp_med=np.median(sp), sp_ge9=(sp >= 0.9).mean(), iou_med=np.median(io), iou_ge8=(io >= 0.8).mean(),
                        blob_iou_med=np.median(iob), sp5_med=np.median(sp5), passes=int(max(npass)),
                        sp_med_sat=np.median(sp[SAT]), sp_med_unsat=np.median(sp[~SAT]),
                        iou_med_sat=np.median(io[SAT]), per_image_sp=sp.tolist(), per_image_iou=io.tolist())
    return res

if __name__ == "__main__":
    results = {}
    def run(name, fn):
        r = evaluate(fn); results[name] = r
        print(f"{name:70s} " + " | ".join(f"{k}: sp {v['sp_med']:.3f} ({v['sp_ge9']:.2f}) iou {v['iou_med']:.2f} ({v['iou_ge8']:.2f}) blob {v['blob_iou_med']:.2f} sp5 {v['sp5_med']:.3f} sat {v['sp_med_sat']:.2f}/{v['sp_med_unsat']:.2f} p{v['passes']}" for k, v in r.items()), flush=True)
    # a. fixed lattices
    for lname, (m, rc) in LAT.items():
        for iname, f in INTERP.items():
            run(f"a {lname} + {iname}", lambda t, m=m, f=f: (m, f(m, t[m])))
        if rc is not None:
            run(f"a {lname} + RGI bilinear", lambda t, m=m, f=interp_rgi(*rc): (m, f(m, t[m])))
    # b/c. coarse + rounds
    for cname, cm in COARSE.items():
        for crit in ["abs", "absdil", "grad", "range", "abs+range"]:
            for rounds in [2, 3]:
                for iname in ["linear", "tps"]:
                    run(f"{'b' if crit in ('abs','absdil') else 'c'} {cname} + {rounds} rounds by {crit}, {iname}",
                        lambda t, cm=cm, crit=crit, rounds=rounds, f=INTERP[iname]: adaptive(t, cm, rounds, crit, f))
    # d. oracle
    for iname, f in INTERP.items():
        run(f"d oracle top-55 |true drop| + {iname}", lambda t, f=f: oracle(t, f))
    json.dump(results, open(str(OUT / "results.json"), "w"))
