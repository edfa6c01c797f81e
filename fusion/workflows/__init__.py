"""The workflows that the commands call: one function per job, from the store and back.

``learning`` (window, fit, record a candidate), ``fusing`` (network magnitudes for a window with
a stored version), ``dry_run`` (what adopting a candidate would change), ``nightly`` (the
unattended run), ``event_view`` (one event explained), ``reporting`` (the station reliability
report) and ``demo`` (the whole job on the invented demo network). They compose the numerical
packages (``fusion.model``, ``fusion.network``) with the store and ``fusion.versions``; the
command line in ``fusion.cli`` only parses options and renders what these return.
"""
