"""The loop front (the one production HTTP front): connection, batcher, bridge, worker."""
