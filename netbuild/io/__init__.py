"""Readers and writers: text in, records or FST files out; parsers keep line numbers."""
