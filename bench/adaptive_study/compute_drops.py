from pathlib import Path as _Path
OUT = _Path(__file__).resolve().parent / "out"   # cached drops and results (not in git)
OUT.mkdir(exist_ok=True)
import numpy as np, time
from pathlib import Path
from shortcut_audit.model import OnnxClassifier
from shortcut_audit.dataset import load_image
from shortcut_audit.occlusion import GridPlan, Fill, patch_boxes, fill_image, paste_boxes
from shortcut_audit.sensitivity import heatmap_job
from shortcut_audit.engine import run_job

clf = OnnxClassifier("/work/main/shortcut_audit/demo/models/baseline.onnx")
print(clf.labels, clf.height, clf.width, clf.channels)
paths = sorted(Path("/work/main/demo_images/images").rglob("*.png"))
print(len(paths))
plan = GridPlan(patch=0.125, stride=0.0625)
boxes = patch_boxes(plan, 64, 64)
assert boxes.shape == (225, 4)

def heat(drops):
    acc = np.zeros((64, 64)); cov = np.zeros((64, 64))
    for (r0, r1, c0, c1), d in zip(boxes, drops):
        acc[r0:r1, c0:c1] += d; cov[r0:r1, c0:c1] += 1
    return acc / cov

P = []; L = []; labels = []; names = []; basep = []; basel = []
t0 = time.time()
for i, p in enumerate(paths):
    px = load_image(p, size=(clf.height, clf.width), channels=clf.channels)
    filled = fill_image(px, Fill(kind="mean"))
    batch = np.concatenate([px[None], paste_boxes(px, boxes, filled)])
    probs = clf.predict(batch); logits = clf.logits(batch)
    P.append(probs); L.append(logits)
    labels.append(clf.labels.index(p.parent.name)); names.append(str(p))
    if i == 0:
        hm = run_job(clf.predict, heatmap_job(px, plan=plan, fill=Fill(kind="mean"), chunk=64))
        t = int(np.argmax(probs[0]))
        mine = heat(probs[0, t] - probs[1:, t])
        print("check vs heatmap_job: max abs diff", np.abs(mine - hm.values).max(), "target", hm.target, t, "passes", hm.passes)
print("time", time.time() - t0)
np.savez_compressed(str(OUT / "drops.npz"), probs=np.array(P), logits=np.array(L),
                    labels=np.array(labels), names=np.array(names), boxes=boxes)
