"""Analyses of a tracking result: free-energy profiles, comparison with static scans and measured
populations, kinetics, 3J couplings and umbrella windows."""
