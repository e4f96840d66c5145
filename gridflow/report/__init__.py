"""gridflow.report"""
