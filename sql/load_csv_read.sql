{#- The one CSV dialect wavebook reads (load_csv.sql stages with it, load_csv_check.sql checks a
    file with it): no type guessing, comma, double quotes, a header line, strict (a row with
    more or fewer fields than the header is an error, never padded or read as one wide column);
    empty fields are NULL. The column names come from the header as pipeline.staging.readers
    reads it, with their types ($columns: name -> VARCHAR or DOUBLE). With `rejects`, a value
    that does not convert to its column's type is skipped and recorded in the temp table
    wb_rejects (DuckDB's rejects table) instead of failing the read. -#}
{% macro read_csv(rejects=false) -%}
read_csv(
    $path,
    auto_detect = false,
    header = true,
    delim = ',',
    quote = '"',
    escape = '"',
    strict_mode = true,
    null_padding = false,
    {%- if rejects %}
    store_rejects = true,
    rejects_table = 'wb_rejects',
    rejects_scan = 'wb_reject_scans',
    {%- endif %}
    columns = $columns
)
{%- endmacro %}
