"""Link models and maths: Gilbert–Elliott/Bernoulli loss models, the online loss estimator, the
impairment core of the user-space lossy link, and the exact residual-loss planner.  Sans-IO.
"""
