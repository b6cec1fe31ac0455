module kestrune.example/dockd

go 1.21
