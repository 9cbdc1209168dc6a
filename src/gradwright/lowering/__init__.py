"""Source text to SSA: parsing and indexing the module, lowering statements and
expressions.
"""
