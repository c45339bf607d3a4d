"""Score side: loading (parse), structural boundaries (markings) and the nominal tempo map."""
