"""Readers and writers at the edges: ordering tables, BIDS events files, the manifest; writes are atomic."""
