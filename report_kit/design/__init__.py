"""Assignment mechanisms: count, enumerate and sample assignments; draw the real assignment from a seed."""
