"""gridflow.demand"""
