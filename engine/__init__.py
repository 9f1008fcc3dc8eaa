"""Pure numerics of honing: priors, polynomial surrogates, likelihood, sampling and design."""
