"""Foundation shared by every stage: input errors, memory estimates and refusal, BLAS threads.

Imports: nothing of qhl outside qhl.base.
"""
