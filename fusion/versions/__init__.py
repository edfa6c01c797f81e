"""What magfuse keeps: immutable station-model versions and the network magnitudes it made.

``model_registry`` stores each learned model as an immutable version beside an atomically
switched active pointer (adopt, rollback); ``fused_store`` records every fusion run with the
model version that made it, and the rows an operator made final. Both commit by an atomic
rename under the store's writer lock.
"""
