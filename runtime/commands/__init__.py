"""The command front-ends: the `shardmill` command line and each command's own module."""
