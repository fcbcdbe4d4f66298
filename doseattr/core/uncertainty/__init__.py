"""Monte Carlo propagation of uncertainty: parameter draws, interval
summaries, and attributable cases by stratum."""
