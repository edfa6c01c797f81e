"""index_of: one id-to-code look-up for the model modules (anchors, thresholds, forgetting)."""

from __future__ import annotations

import numpy as np

from fusion.observations import index_of


def test_index_of_finds_codes_and_marks_absent_ids() -> None:
    table = np.array(["ZZ.S003.", "ZZ.S001.", "ZZ.S002."])
    keys = np.array(["ZZ.S001.", "ZZ.S009.", "ZZ.S003.", "AA.S000."])
    np.testing.assert_array_equal(index_of(table, keys), [1, -1, 0, -1])


def test_index_of_empty_table_gives_minus_one() -> None:
    out = index_of(np.array([], dtype=str), np.array(["ZZ.S001."]))
    np.testing.assert_array_equal(out, [-1])
    assert out.dtype == np.int64


def test_model_modules_share_one_lookup() -> None:
    import fusion.model.anchors as anchors
    import fusion.model.forgetting as forgetting
    import fusion.model.thresholds as thresholds

    assert anchors.index_of is forgetting.index_of is thresholds.index_of is index_of
