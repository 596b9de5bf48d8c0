-- A Parquet wave file as a temp table of text columns. rowid + 1 is the data row number.
{% from "load_text_columns.sql" import text_columns %}
create or replace temp table {{ table|ident }} as
select
    {{- text_columns(columns) }}
from read_parquet($path)
