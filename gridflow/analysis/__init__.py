"""gridflow.analysis"""
