"""Tests of policyc.evidence."""
