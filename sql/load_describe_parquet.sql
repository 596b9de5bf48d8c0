-- Column names and types of a Parquet file.
describe select * from read_parquet($path)
