"""What a scan yields beyond its rows: baseline, line integral, the scan average."""
