"""The per-event network magnitude: one GLS estimate with its uncertainty for every event.

:func:`~fusion.network.network_magnitude.fuse_events` combines each event's bias-corrected
station magnitudes with the weights implied by the station parameters (``gls_blocks`` for the
covariance blocks of correlated pairs, ``event_gls`` for the per-event sums and the
leave-one-station-out algebra, ``censoring`` for the censored likelihood of events with
non-detections). Everything is vectorized over events; nothing here reads the store.
"""
