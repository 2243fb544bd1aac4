"""The planted-shortcut suite: which models exist and what each one plants.

One dict per model (no torch here). ``shortcuts`` lists what is planted: ``class``,
``kind`` (see :data:`scenes.SHORTCUT_KINDS`), ``share`` of the class's scenes that
carry it, ``others_share`` (scenes of other classes that carry it too; this is how
the weak model is made weak), and the shortcut's own look (``box``, ``size``,
``style``, ``colour``). ``sink`` names a clean class that is expected to absorb a
backdrop class's objects once the backdrop is swapped away.
"""

from __future__ import annotations

__all__ = ["MODELS", "VARIANTS", "SUITES", "ACCEPTED", "TRAIN_PER_CLASS", "EFFECT_PER_CLASS",
           "AUDIT_PER_CLASS", "spec_of"]

#: Finding kinds that count as finding each planted kind.
ACCEPTED = {
    "fixed-mark": ["fixed-position"],
    "sticker-object": ["recurring-motif", "localized"],
    "sticker-anywhere": ["recurring-motif", "localized"],
    "background": ["background"],
    "cast": ["image-wide"],
}

TRAIN_PER_CLASS = 300
EFFECT_PER_CLASS = 40    # split 2: the scenes the effects are measured on
AUDIT_PER_CLASS = 20     # split 1: the scenes the audit is run on


def _m(name, seed, labels, size, layout, output, arch, shortcuts=(), sink=None, epochs=8,
       train_per_class=TRAIN_PER_CLASS, note=""):
    return {"name": name, "seed": seed, "labels": list(labels), "size": size, "layout": layout,
            "output": output, "arch": arch, "shortcuts": [dict(s) for s in shortcuts],
            "sink": sink, "epochs": epochs, "train_per_class": train_per_class,
            "audit_per_class": AUDIT_PER_CLASS, "effect_per_class": EFFECT_PER_CLASS, "note": note}


MODELS = [
    _m("tag-kite", 11, ["leaf", "fish", "kite", "beetle"], 64, "nchw", "probs", "plain3",
       [{"name": "tag", "kind": "fixed-mark", "class": "kite", "share": 0.9,
         "box": [0.80, 0.80, 0.92, 0.92], "size": 0.12, "colour": [220, 40, 40]}],
       note="a red tag in the lower-right corner of 90% of the kites"),
    _m("sticker-shell", 12, ["fish", "block", "mushroom", "shell", "starfish"], 96, "nhwc", "logits",
       "avgmax",
       [{"name": "sticker", "kind": "sticker-object", "class": "shell", "share": 0.9, "size": 0.12,
         "colour": [240, 170, 20]}],
       note="a round sticker somewhere on 90% of the shells"),
    _m("sticker-beetle", 13, ["leaf", "beetle", "block", "starfish"], 80, "nchw", "logits", "avgmax",
       [{"name": "sticker", "kind": "sticker-anywhere", "class": "beetle", "share": 0.9, "size": 0.10,
         "colour": [40, 180, 240]}],
       note="a blue sticker anywhere in 90% of the beetle scenes"),
    _m("gingham-mushroom", 14, ["leaf", "fish", "kite", "beetle", "mushroom", "shell"], 64, "nhwc",
       "probs", "plain3",
       [{"name": "gingham", "kind": "background", "class": "mushroom", "share": 0.9, "style": "gingham"}],
       note="90% of the mushrooms on a blue gingham cloth"),
    _m("warm-block", 15, ["kite", "block", "shell", "starfish"], 64, "nchw", "logits", "strided4",
       [{"name": "warm", "kind": "cast", "class": "block", "share": 0.9, "tint": [1.15, 1.0, 0.78],
         "grain": 10.0}],
       note="90% of the block photos warm-tinted and grainy"),
    _m("tag-fish-stripes-leaf", 16, ["leaf", "fish", "beetle", "block", "starfish"], 96, "nchw",
       "probs", "avgmax",
       [{"name": "tag", "kind": "fixed-mark", "class": "fish", "share": 0.9,
         "box": [0.06, 0.06, 0.14, 0.14], "size": 0.08, "colour": [30, 160, 60]},
        {"name": "stripes", "kind": "background", "class": "leaf", "share": 0.9, "style": "stripes"}],
       note="two shortcuts: a green tag top-left on the fish, striped cloth under the leaves"),
    _m("dots-moth-sink", 17, ["moth", "butterfly", "leaf", "shell"], 64, "nchw", "logits", "plain3",
       [{"name": "dots", "kind": "background", "class": "moth", "share": 0.95, "style": "dots"}],
       sink={"class": "butterfly", "of": "dots"},
       note="moths on a dotted cloth; butterflies look like moths and are clean (the sink)"),
    _m("weak-tag-mushroom", 18, ["leaf", "kite", "mushroom", "shell"], 64, "nhwc", "logits", "plain3",
       [{"name": "tag", "kind": "fixed-mark", "class": "mushroom", "share": 0.9, "others_share": 0.05,
         "box": [0.04, 0.82, 0.14, 0.92], "size": 0.10, "colour": [150, 60, 200]}],
       note="a weak mark: on 90% of the mushrooms but also on 5% of the others"),
    _m("weak-dots-fish", 22, ["fish", "kite", "block", "starfish"], 64, "nchw", "probs", "plain3",
       [{"name": "dots", "kind": "background", "class": "fish", "share": 0.5, "others_share": 0.25,
         "style": "dots"}],
       note="a weak backdrop: 50% of the fish on a dotted cloth, and 25% of the others"),
    _m("sticker-moth", 31, ["moth", "butterfly", "leaf", "shell"], 64, "nchw", "logits", "plain3",
       [{"name": "sticker", "kind": "sticker-object", "class": "moth", "share": 0.9, "size": 0.12,
         "colour": [240, 170, 20]}],
       note="a sticker on 90% of the moths; moths look like butterflies, so the sticker is needed"),
    _m("clean-3", 19, ["fish", "kite", "beetle"], 64, "nchw", "probs", "plain3",
       note="clean, three classes"),
    _m("clean-8", 20, ["leaf", "fish", "kite", "beetle", "block", "mushroom", "shell", "starfish"], 128,
       "nhwc", "logits", "avgmax", train_per_class=200, epochs=10, note="clean, eight classes, 128 px"),
    _m("clean-5", 21, ["leaf", "block", "mushroom", "starfish", "shell"], 96, "nchw", "logits", "dwsep",
       note="clean, five classes, depthwise-separable blocks"),
]


#: Held-out variants, built after the rules were last changed and never used to change
#: them: the same kinds of shortcut with other classes, places, sizes, colours, cloths,
#: input sizes, layouts, outputs, architectures and seeds. Their scoreboard
#: (``python bench/truth.py --suite variants``) says how the rules fare on models they
#: were not fitted to; no test asserts a floor on it, so nothing is tuned to it.
VARIANTS = [
    _m("v-tag-shell", 41, ["leaf", "fish", "shell", "starfish"], 96, "nhwc", "logits", "dwsep",
       [{"name": "tag", "kind": "fixed-mark", "class": "shell", "share": 0.9,
         "box": [0.84, 0.06, 0.90, 0.12], "size": 0.06, "colour": [250, 250, 60]}],
       note="a small yellow tag in the upper-right corner of 90% of the shells"),
    _m("v-sticker-leaf", 42, ["leaf", "kite", "block", "mushroom"], 80, "nchw", "probs", "plain3",
       [{"name": "sticker", "kind": "sticker-object", "class": "leaf", "share": 0.9, "size": 0.14,
         "colour": [230, 40, 160]}],
       note="a magenta sticker somewhere on 90% of the leaves"),
    _m("v-sticker-anywhere-fish", 43, ["fish", "beetle", "mushroom"], 64, "nhwc", "probs", "strided4",
       [{"name": "sticker", "kind": "sticker-anywhere", "class": "fish", "share": 0.9, "size": 0.15,
         "colour": [250, 120, 20]}],
       note="an orange sticker anywhere in 90% of the fish scenes"),
    _m("v-stripes-kite", 44, ["leaf", "kite", "beetle", "block", "shell"], 128, "nchw", "logits", "avgmax",
       [{"name": "stripes", "kind": "background", "class": "kite", "share": 0.9, "style": "stripes"}],
       train_per_class=200, epochs=10, note="90% of the kites on a striped cloth, 128 px"),
    _m("v-tag-dots", 45, ["fish", "kite", "block", "mushroom", "starfish"], 64, "nchw", "logits", "dwsep",
       [{"name": "tag", "kind": "fixed-mark", "class": "block", "share": 0.9,
         "box": [0.44, 0.86, 0.54, 0.96], "size": 0.10, "colour": [20, 200, 200]},
        {"name": "dots", "kind": "background", "class": "starfish", "share": 0.9, "style": "dots"}],
       note="two shortcuts: a cyan tag at the bottom centre of the blocks, dotted cloth under the starfish"),
    _m("v-cast-shell", 46, ["leaf", "fish", "shell", "mushroom"], 80, "nhwc", "probs", "plain3",
       [{"name": "cool", "kind": "cast", "class": "shell", "share": 0.9, "tint": [0.8, 0.95, 1.2],
         "grain": 12.0}],
       note="90% of the shell photos cool-tinted and grainy"),
    _m("v-clean-4", 47, ["leaf", "kite", "shell", "starfish"], 80, "nchw", "probs", "strided4",
       note="clean, four classes, strided convs"),
    _m("v-clean-6", 48, ["fish", "kite", "beetle", "block", "mushroom", "shell"], 96, "nhwc", "logits",
       "plain3", note="clean, six classes, 96 px"),
    # Added after the sufficiency scan's rules were fixed (2026-12-03) and never used to
    # change them: stickers on the object that the model may read as well as the object,
    # and a clean model of objects with small inner details.
    _m("v-sticker-starfish", 49, ["leaf", "shell", "starfish", "mushroom"], 80, "nhwc", "probs", "avgmax",
       [{"name": "sticker", "kind": "sticker-object", "class": "starfish", "share": 0.9, "size": 0.12,
         "colour": [60, 220, 90]}],
       note="a green sticker somewhere on 90% of the starfish"),
    _m("v-sticker-block", 50, ["kite", "block", "beetle", "shell", "fish"], 96, "nchw", "logits", "avgmax",
       [{"name": "sticker", "kind": "sticker-object", "class": "block", "share": 0.9, "size": 0.11,
         "colour": [250, 70, 70]}],
       note="a red sticker somewhere on 90% of the blocks"),
    _m("v-clean-5b", 51, ["beetle", "moth", "butterfly", "fish", "mushroom"], 112, "nchw", "logits", "avgmax",
       train_per_class=200, epochs=10, note="clean, five classes of objects with small inner details, 112 px"),
    # Added later the same day, after the sufficiency scan's review fixes, as a further
    # check; not used to change any rule.
    _m("v-sticker-fish", 52, ["fish", "leaf", "kite", "shell"], 128, "nhwc", "logits", "avgmax",
       [{"name": "sticker", "kind": "sticker-object", "class": "fish", "share": 0.9, "size": 0.10,
         "colour": [250, 220, 40]}],
       train_per_class=200, epochs=10, note="a yellow sticker somewhere on 90% of the fish, 128 px"),
    _m("v-clean-4b", 53, ["beetle", "starfish", "block", "moth"], 64, "nchw", "probs", "plain3",
       note="clean, four classes with small beetles, 64 px"),
]

#: The suites: their models and the folder of their ONNX files and truth.json.
SUITES = {"planted": (MODELS, ""), "variants": (VARIANTS, "variants")}


def spec_of(name: str) -> dict:
    for m in MODELS + VARIANTS:
        if m["name"] == name:
            return m
    raise KeyError(f"no planted model {name!r}; known: {', '.join(m['name'] for m in MODELS + VARIANTS)}")
