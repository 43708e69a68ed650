"""Policy backtest: stored history re-evaluated under two policies with the live rules code on a
simulated clock, compared side by side. Decision support only."""
