"""Tests of policyc.review."""
