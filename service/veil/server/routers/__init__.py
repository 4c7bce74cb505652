"""One router per area: erasers (apply, counterfactual, listing), search vectors, drift, health, admin."""
