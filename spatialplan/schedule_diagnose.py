"""placeholder"""
def diagnose(problem, settings):
    return []
