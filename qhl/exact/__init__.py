"""Exact classical computation: magnetisation sectors, divided differences, the exact engine
(signals, gradients, Hessians), powder averages, likelihood and Fisher information, signal
reports and plots, and the gradient-provider protocol that the learning loop and the emulator share.

Imports: qhl.base, qhl.spins.
"""
