"""The circuit compiler: product formulas, commutator bounds, the Trotterised reference
(exact, no shots), input ensembles for rho0, signal / gradient / Hessian circuit families and
gate counts. Circuits are returned, never executed, here.

Imports: qhl.base, qhl.spins, qhl.exact.
"""

# Trotter steps of one built circuit: 10,000 steps on the 6-spin demo took 167 s and 1.5 GiB to
# build and transpile (measured once); gate counts grow linearly, so larger r is costed by formula.
MAX_BUILT_STEPS = 5000
