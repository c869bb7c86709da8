"""knowngood service: serves a model bundle over REST v1, keeps the audit store, watches drift, hosts the operator
page."""
