-- A CSV wave file as a query in the strict dialect of load_csv_read.sql, read where it is used:
-- staging inserts the wave's rows straight from the file (pipeline.staging.stage), the columns
-- the spec reads as numbers typed DOUBLE, a value that does not convert recorded in wb_rejects.
{% from "load_csv_read.sql" import read_csv %}
select * from {{ read_csv(true) }}
