"""Review tools beside the flow: diff, evaluate, priors, plot, inspect.

They consume Policies and Rules and never reach back into the parser. They are siblings: each may use
``policyc.geometry``, ``policyc.evidence.io`` (data reading) and ``policyc.review.shared``, never another tool.
"""
