"""Detection on the image: masks, the pattern centre, spots and rings."""
