"""Serving calls and files: the call engines, stdio streaming, the RTP relay, and batches of files."""
