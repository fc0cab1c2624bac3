"""The circuit compiler: product formulas, commutator bounds, the Trotterised reference
(exact, no shots), input ensembles for rho0, signal / gradient / Hessian circuit families and
gate counts. Circuits are returned, never executed, here.

Imports: qhl.base, qhl.spins, qhl.exact.
"""
