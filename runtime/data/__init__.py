"""The data readers: files and tables in, the split, standardisation, the sampler and sharding."""
