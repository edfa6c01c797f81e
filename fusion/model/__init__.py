"""The station model and its fitters: what magfuse learns about each station without ground truth.

:class:`~fusion.model.station_model.StationModel` is the estimator (scikit-learn shape) that
turns an :class:`~fusion.observations.ObservationSet` into
:class:`~fusion.model.parameters.StationParameters`: each station's bias and error standard
deviation from the profiled REML-type EM (``reml_em``; with non-detections the joint censored fit
``censored_fit`` and the detection curves of ``thresholds``), the empirical-Bayes priors
(``eb_priors``), the anchor that fixes the common level (``anchors``, ``connectivity``), the
rolling window with forgetting (``forgetting``), station epochs (``epochs``), correlated pairs
(``pair_tests`` with ``multiple_testing``), label-free checks (``validation``) and the seeded
simulator with its oracle (``simulation``). Nothing here reads the store or writes files.
"""
