"""Tests of linkage.models and the train/models commands."""
