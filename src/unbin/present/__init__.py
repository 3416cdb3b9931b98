"""What people read: the terminal summary, the HTML report and the figures."""
