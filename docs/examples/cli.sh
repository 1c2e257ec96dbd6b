# docs/examples/cli.sh: the command line, in a folder holding cloud.npy, clouds/, edges.csv, image.npy and textures/
chitally scan   cloud.npy                                          # which eps? degrees, edges, time and memory per eps
chitally plan   cloud.npy --eps 0.05                               # dry run: tasks, halos, memory; writes nothing
chitally curve  cloud.npy --eps 0.05 --max-dim 3 --out curve.csv   # in process
chitally run    cloud.npy --eps 0.05 --out run.zarr --workers 2    # LocalCluster on this machine
chitally status run.zarr
chitally resume run.zarr                                           # continues an interrupted run
chitally export run.zarr --out curve.json                          # exact steps
chitally export run.zarr --grid 0:0.05:11 --out samples.csv        # samples on a grid
chitally batch  clouds --eps 0.5 --grid 0:0.5:32 --out fm.zarr --workers 2
chitally export fm.zarr --out features.csv                         # name,chi(0.0),...
chitally graph  edges.csv --values degree --out graph-curve.csv     # a graph's lower-star curve
chitally field  image.npy --construction cells --out field-curve.csv # an image's sublevel curve
chitally batch  textures --construction cells --grid 0:255:32 --out tex.zarr --workers 2  # textures/<class>/*.png
chitally export tex.zarr --out texture-features.csv                # name,label,chi(0.0),...: labels from the subfolders
