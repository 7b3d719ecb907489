"""Station commands beside the daemon: doctor, chain, soak, bench, inspect, loads."""
