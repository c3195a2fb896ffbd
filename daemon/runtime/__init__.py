"""The service that runs in the plant: feed, models, publishing, state folder, security."""
