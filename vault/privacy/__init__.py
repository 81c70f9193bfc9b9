"""Pure differential privacy: samplers, mechanisms, the exact accountant, recommender and utility."""
