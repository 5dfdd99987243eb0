"""Variants studies: many variants of one job packed onto the ranks of one launch (``shardmill variants``)."""
