"""The computing core: preprocessing statistics, streaming passes, the memory plan and the engine.

Knows per-feature statistics, block products and linear algebra; nothing about files'
formats or what the axes mean.
"""
