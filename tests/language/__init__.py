"""Tests of policyc.language."""
