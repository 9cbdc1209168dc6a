"""The only place that knows derivatives: primitives, the rule table, the algebra rules
are written in.
"""
