"""Clients: the command line (``stateworth ...``) and the Python gRPC client."""
