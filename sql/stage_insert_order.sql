-- Whether DuckDB keeps the file's row order when it inserts (`keep`: back to the default, true).
-- Staging straight from the file lets the reader's threads insert in any order: `responses` is
-- read ordered (load_responses.sql) and row numbers come from the exact path's temp table.
{% if keep %}reset preserve_insertion_order{% else %}set preserve_insertion_order = false{% endif %}
