"""Model checks of a fit: leave-one-out predictive checks, the variogram check and fit comparison."""
