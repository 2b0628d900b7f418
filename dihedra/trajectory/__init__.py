"""The trajectory pass: opening topologies and trajectories with clear errors, dihedra's XTC
decoder, and the streaming MDAnalysis analysis that turns frames into states, histograms and
block sums."""
