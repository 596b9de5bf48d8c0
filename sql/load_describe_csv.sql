-- Column names of a CSV file (all read as text).
describe select * from read_csv($path, all_varchar = true, header = true)
