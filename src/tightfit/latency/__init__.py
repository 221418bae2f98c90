"""Latency on target devices: probe bundles (probe), latency tables on the host (table),
and the predictor that turns a table into any subnet's latency (predict)."""
