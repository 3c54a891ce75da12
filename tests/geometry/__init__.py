"""Tests of policyc.geometry."""
