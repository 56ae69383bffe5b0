"""A lab's own recordings (ROS 2 bags, CSV files) turned into schema-v1 demonstration episodes.

Reading (bag_reader with topics, csv_reader) gives a Recording of raw timestamped streams; timing checks
them for gaps, duplicated timestamps and clock jumps back; resample puts them on the schema's uniform time
grid; to_episodes cuts the grid at goal-label changes and adds the scene layout and tool poses;
stick_parquet writes the set with the operator's stick as an extra column; import_command (with options)
is `coreach import-recordings`.
"""
