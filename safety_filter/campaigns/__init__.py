"""Campaigns: runs of many runs that also report.

The replay of a folder of bags (:mod:`~safety_filter.campaigns.replay_batch`, one bag's job in
:mod:`~safety_filter.campaigns.replay_job`, on a Dask cluster with
:mod:`~safety_filter.campaigns.replay_cluster`) and the stress test (its matrix in
:mod:`~safety_filter.campaigns.stress_matrix`, the runs in
:mod:`~safety_filter.campaigns.stress_runs`, the verdict in
:mod:`~safety_filter.campaigns.stress_verdict`). Worker processes are started the same way
for both (:mod:`~safety_filter.campaigns.worker_processes`). No ROS and no command line
here: the commands are in :mod:`safety_filter.cli`.
"""
