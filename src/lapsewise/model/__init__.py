"""Model: the hidden-churn process, its p-moments and survival terms, the churn and order-value fits, posteriors."""
