"""HTTP routers."""
