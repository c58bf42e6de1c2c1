"""The estimator family: recursive WLS with exponential forgetting in square-root information form (vectorised over
a bank of channels, with its scalar twin kernel), batch WLS in closed form, and the statistics of a fit
(covariance, standard errors, excitation).
"""
