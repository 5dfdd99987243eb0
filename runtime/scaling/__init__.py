"""Scaling studies: the ``shardmill scale`` driver, the per-P worker, the study it assembles, the pure
allreduce cost model and the report page."""
