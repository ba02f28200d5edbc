"""Speed measurements against in-process baselines (run with `make bench`)."""
