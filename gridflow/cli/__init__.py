"""gridflow.cli"""
