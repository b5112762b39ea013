"""Budget: the value of mailing each customer, segments, the budget integer program and the mail list."""
