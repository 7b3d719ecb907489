"""Scans on the disk: the journal, the FITS files, crash recovery, the writer thread."""
