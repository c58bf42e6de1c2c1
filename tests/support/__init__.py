"""Support shared by the tests: helpers that are not tests themselves and not part of the product."""
