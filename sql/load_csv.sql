-- A CSV wave file as a temp table in the strict dialect of load_csv_read.sql: text columns exactly
-- as written, and the columns the spec reads as numbers typed DOUBLE (pipeline.staging.readers).
-- rowid + 1 is the data row number. Identifiers: table, rejects (record conversion failures in
-- wb_rejects instead of failing).
{% from "load_csv_read.sql" import read_csv %}
create or replace temp table {{ table|ident }} as
select * from {{ read_csv(rejects) }}
