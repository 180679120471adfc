"""Monitors: the lab around the atoms, as time series logged independently of the shots.

Owns the monitor-table contract (:mod:`runlog.monitors.contract`, docs/monitor-table.md),
monitor ingest (:mod:`runlog.monitors.ingest`) and the minute / hour / lab-day rollups kept
at ingest (:mod:`runlog.monitors.rollups`).
"""
