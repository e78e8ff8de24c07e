"""After the loop: tables, the guest reference, every figure, the HTML report."""
