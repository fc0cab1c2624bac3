"""Spin clusters and their Hamiltonian model: isotopes, the dipolar constant, cluster value
types, cluster-file readers (TOML, XYZ) and the named-parameter model H = 2 pi sum_n s_n h_n G_n.

Imports: qhl.base only.
"""
