"""Tests of policyc.compiler."""
