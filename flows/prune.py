"""Deployable entry point for the one-off pruning flow: `flows/prune.py:prune_flow`."""

from leanset.flows import prune_flow

if __name__ == "__main__":
    import sys

    print(prune_flow(sys.argv[1]))
