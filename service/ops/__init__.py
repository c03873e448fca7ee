"""What operators read about a running deployment: job tallies kept in Redis, figures from the records DB,
the data dir's identity marker and its checks. Nothing here imports Flask or scikit-learn, and no figure
carries a team, a key or a submission id.
"""
