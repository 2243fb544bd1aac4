"""Tests of classes.py: per-class aggregates, worked by hand on a few image summaries."""

import numpy as np
import pytest

from shortcut_audit.classes import ClassAccumulator, ImageSummary, place_map, summarise_classes


def im(path, label, predicted, *, area=None, box=None, peak=None, share=None, survives=None,
       erased_to=None, peak_on=None):
    return ImageSummary(path=path, label=label, predicted=predicted, confidence=0.9, label_score=0.9,
                        concentration=0.2, gini=0.5, decisive_area=area, decisive_box=box,
                        peak_box=peak, deletion_area=0.1, insertion_area=0.6, background_share=share,
                        mask_source="given" if share is not None else None,
                        survives_object_erased=survives, object_erased_prediction=erased_to,
                        peak_on_object=peak_on)


CORNER = [0.75, 0.75, 1.0, 1.0]


def test_place_map_counts_boxes_per_pixel():
    pm = place_map([[0.0, 0.0, 0.5, 0.5], [0.25, 0.25, 0.75, 0.75]], (4, 4))
    assert pm.tolist() == [[1, 1, 0, 0], [1, 2, 1, 0], [0, 1, 1, 0], [0, 0, 0, 0]]


def test_summaries_worked_example():
    # class 0: 4 images, 3 correct; 2 of those hinge on <= 5% (areas 0.02, 0.04), both at the
    # corner -> small-area rate 2/3, box agreement 2/2. Object erased: 2 of 3 survive;
    # of class 1's 2 erased images 1 becomes class 0 -> reliance 2/3 - 1/2.
    images = [
        im("a/1", 0, 0, area=0.02, box=CORNER, peak=CORNER, share=0.8, survives=True, erased_to=0, peak_on=0.0),
        im("a/2", 0, 0, area=0.04, box=CORNER, peak=CORNER, share=0.6, survives=True, erased_to=0, peak_on=0.0),
        im("a/3", 0, 0, area=0.20, box=[0, 0, 0.5, 0.5], peak=[0.4, 0.4, 0.6, 0.6], share=0.1,
           survives=False, erased_to=1, peak_on=1.0),
        im("a/4", 0, 1),
        im("b/1", 1, 1, area=None, share=0.2, survives=True, erased_to=0),
        im("b/2", 1, 1, area=None, share=0.3, survives=True, erased_to=1),
    ]
    a, b = summarise_classes(images, ("a", "b"), shape=(8, 8))
    assert (a.images, a.correct, a.accuracy) == (4, 3, 0.75)
    assert a.metrics["small_area_rate"] == pytest.approx(2 / 3)
    assert a.metrics["box_agreement"] == pytest.approx(1.0)
    assert a.place_box == CORNER
    assert a.metrics["median_background_share"] == pytest.approx(0.6)
    assert a.metrics["object_erased_survival"] == pytest.approx(2 / 3)
    assert a.metrics["erased_default_rate"] == pytest.approx(0.5)
    assert a.metrics["background_reliance"] == pytest.approx(2 / 3 - 0.5)
    # heat peaks: 2 of the 3 correct images peak at the corner, off the object
    assert a.metrics["peak_agreement"] == pytest.approx(2 / 3)
    assert a.peak_place_box == CORNER and a.metrics["peak_on_object"] == 0.0
    assert b.metrics["small_area_rate"] == 0.0 and b.metrics["box_agreement"] == 0.0


def test_accumulator_means_per_class():
    acc = ClassAccumulator(2, (2, 2))
    acc.add(0, np.ones((2, 2)))
    acc.add(0, np.zeros((2, 2)))
    np.testing.assert_allclose(acc.mean(0), np.full((2, 2), 0.5))
    assert acc.mean(1) is None
