"""Tests of policyc.runtime."""
