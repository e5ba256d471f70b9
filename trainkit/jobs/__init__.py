"""The room for trust on each new job: sampling a finished scan's cells and estimating its recall."""
