"""Which torsions and which states: torsion sets from a topology (rotatable bonds, protein and
nucleic-acid presets, explicit atoms, TOML files) and state schemes (angle -> state code)."""
