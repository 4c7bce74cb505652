"""One router per area: erasers (apply, counterfactual, listing), drift, health, admin."""
